"""Compiled (numba) inner loops of the SumThreshold flagger, the background fit
and the SIR operator.

Everything here works on C-contiguous 2-D planes ``(time, channel)`` and is
compiled with ``nogil=True`` (so dask threads run in parallel) and ``cache=True``.
The public, documented entry points are in :mod:`rfisieve.background`,
:mod:`rfisieve.sumthreshold` and :mod:`rfisieve.morphology`; the functions here
check nothing and may overwrite their output arguments.

Two loop shapes are used:

* along axis 0 (time, the strided axis): one running quantity per channel and an
  inner loop over the contiguous channel axis, which the compiler vectorises;
* along axis 1 (channel, the contiguous axis): blocks of ``_ROWS`` rows are
  processed together, inner loop over the rows of the block, so that the running
  sums of different rows are independent and the loop is not latency bound.
"""

import numpy as np
from numba import njit

_ROWS = 16          # rows processed together by the axis-1 loops
_TILE = 64          # tile edge of the transpose

# Levels in the SumThreshold working array (uint8):
LEV_FREE = 0        # not flagged
LEV_INPUT = 1       # flagged on input
LEV_INVALID = 255   # invalid: left out of every sum
# a detection by pass q (window 2**(q-1)) is stored as q + 1 (2 .. 254)

_opts = dict(nogil=True, cache=True, fastmath=False, error_model="numpy", boundscheck=False)


# --------------------------------------------------------------------------- utilities
@njit(**_opts)
def transpose(a, out):
    """out[j, i] = a[i, j], tiled for cache."""
    n, m = a.shape
    for i0 in range(0, n, _TILE):
        i1 = min(i0 + _TILE, n)
        for j0 in range(0, m, _TILE):
            j1 = min(j0 + _TILE, m)
            for j in range(j0, j1):
                for i in range(i0, i1):
                    out[j, i] = a[i, j]


# --------------------------------------------------------------- normalised smoothing
@njit(**_opts)
def weights(x, exclude, num, den):
    """num = x where not excluded else 0; den = 1 where not excluded else 0."""
    n, m = x.shape
    for t in range(n):
        for c in range(m):
            e = exclude[t, c]
            num[t, c] = np.float32(0.0) if e else x[t, c]
            den[t, c] = np.float32(0.0) if e else np.float32(1.0)


@njit(**_opts)
def box2_axis0(a, b, r, oa, ob, sa, sb):
    """Running box sums of half-width ``r`` along axis 0 of ``a`` and ``b``
    (zero outside the plane), into ``oa``, ``ob`` (must not alias the inputs).
    ``sa``, ``sb``: float64 scratch of length ``a.shape[1]``."""
    n, m = a.shape
    for c in range(m):
        sa[c] = 0.0
        sb[c] = 0.0
    for t in range(min(r, n)):
        for c in range(m):
            sa[c] += a[t, c]
            sb[c] += b[t, c]
    for t in range(n):
        ad = t + r
        su = t - r - 1
        if ad < n and su >= 0:
            for c in range(m):
                va = sa[c] + a[ad, c] - a[su, c]
                vb = sb[c] + b[ad, c] - b[su, c]
                sa[c] = va
                sb[c] = vb
                oa[t, c] = va
                ob[t, c] = vb
        elif ad < n:
            for c in range(m):
                va = sa[c] + a[ad, c]
                vb = sb[c] + b[ad, c]
                sa[c] = va
                sb[c] = vb
                oa[t, c] = va
                ob[t, c] = vb
        elif su >= 0:
            for c in range(m):
                va = sa[c] - a[su, c]
                vb = sb[c] - b[su, c]
                sa[c] = va
                sb[c] = vb
                oa[t, c] = va
                ob[t, c] = vb
        else:
            for c in range(m):
                oa[t, c] = sa[c]
                ob[t, c] = sb[c]


@njit(**_opts)
def box2_axis1(a, b, r, oa, ob):
    """As :func:`box2_axis0`, along axis 1: per row, prefix sums P (float64) of
    both arrays computed together, then out[c] = P[min(c + r + 1, m)] - P[max(c - r, 0)]."""
    n, m = a.shape
    pa = np.empty(m + 1)
    pb = np.empty(m + 1)
    for t in range(n):
        ua = 0.0
        ub = 0.0
        pa[0] = 0.0
        pb[0] = 0.0
        for c in range(m):
            ua += a[t, c]
            ub += b[t, c]
            pa[c + 1] = ua
            pb[c + 1] = ub
        for c in range(m):
            hi = min(c + r + 1, m)
            lo = max(c - r, 0)
            oa[t, c] = pa[hi] - pa[lo]
            ob[t, c] = pb[hi] - pb[lo]


@njit(**_opts)
def ratio(num, den, out):
    """out = num / den where den > 0, NaN elsewhere; returns the NaN count."""
    n, m = num.shape
    bad = 0
    for t in range(n):
        for c in range(m):
            d = den[t, c]
            if d > 0.0:
                out[t, c] = num[t, c] / d
            else:
                out[t, c] = np.nan
                bad += 1
    return bad


@njit(**_opts)
def fill_gaps(b):
    """Fill NaNs of ``b`` in place: linearly between the nearest defined channels
    of the same dump (nearest value beyond the last one); dumps with no defined
    channel take the nearest defined dump (the earlier one on a tie)."""
    n, m = b.shape
    rowok = np.zeros(n, np.bool_)
    for t in range(n):
        last = -1
        for c in range(m):
            if b[t, c] == b[t, c]:
                if last < 0 and c > 0:
                    for k in range(c):
                        b[t, k] = b[t, c]
                elif last >= 0 and c > last + 1:
                    v0 = b[t, last]
                    v1 = b[t, c]
                    for k in range(last + 1, c):
                        f = (k - last) / (c - last)
                        b[t, k] = v0 + (v1 - v0) * f
                last = c
        if last >= 0:
            rowok[t] = True
            for k in range(last + 1, m):
                b[t, k] = b[t, last]
    prev = -1
    for t in range(n):
        if rowok[t]:
            prev = t
            continue
        nxt = -1
        for u in range(t + 1, n):
            if rowok[u]:
                nxt = u
                break
        src = -1
        if prev >= 0 and (nxt < 0 or t - prev <= nxt - t):
            src = prev
        elif nxt >= 0:
            src = nxt
        if src >= 0:
            for c in range(m):
                b[t, c] = b[src, c]


# ----------------------------------------------------------------------- SumThreshold
@njit(**_opts)
def residual(x, bg, lev, out):
    """out = x / bg - 1 for samples that are not invalid (0 for invalid ones)."""
    n, m = x.shape
    for t in range(n):
        for c in range(m):
            v = x[t, c] / bg[t, c] - np.float32(1.0)
            out[t, c] = np.float32(0.0) if lev[t, c] == LEV_INVALID else v


@njit(**_opts)
def init_levels(flagged, invalid, lev):
    """lev = 255 where invalid, 1 where flagged, 0 elsewhere; returns (per-row
    count of invalid samples, per-column count of invalid samples)."""
    n, m = lev.shape
    rowbad = np.zeros(n, np.int64)
    colbad = np.zeros(m, np.int64)
    for t in range(n):
        for c in range(m):
            if invalid[t, c]:
                lev[t, c] = LEV_INVALID
                rowbad[t] += 1
                colbad[c] += 1
            elif flagged[t, c]:
                lev[t, c] = LEV_INPUT
            else:
                lev[t, c] = LEV_FREE
    return rowbad, colbad


@njit(**_opts)
def st_pass_one(x, lev, thr):
    """Window M = 1 (pass q = 1): flag free samples with x > thr (level 2)."""
    n, m = x.shape
    for t in range(n):
        for c in range(m):
            if lev[t, c] == LEV_FREE and x[t, c] > thr:
                lev[t, c] = 2


@njit(**_opts)
def st_axis0(x, lev, rows, chi1, rho, npass, q0, s, last):
    """SumThreshold passes q0 .. npass (window M = 2**(q-1)) along axis 0 for all
    columns at once, over the row list ``rows`` (rows not wholly invalid).
    Invalid samples inside those rows enter as 0 (their columns must be redone
    by :func:`st_columns_scalar`).  ``s`` float64 and ``last`` int64 scratch of
    length ``x.shape[1]``."""
    n, m = x.shape
    nr = rows.shape[0]
    for q in range(q0, npass + 1):
        M = 1 << (q - 1)
        thr = chi1 / rho ** (q - 1)
        lim = M * thr
        qq = np.uint8(q)
        newlev = np.uint8(q + 1)
        for c in range(m):
            s[c] = 0.0
            last[c] = -1
        for k in range(nr + M - 1):
            j = k - M + 1
            if k < nr:
                ta = rows[k]
                for c in range(m):
                    lv = lev[ta, c]
                    v = np.float64(x[ta, c])
                    if lv != 0 and lv <= qq:
                        v = thr
                    if lv == LEV_INVALID:
                        v = 0.0
                    s[c] += v
            if k >= M:
                ts = rows[k - M]
                for c in range(m):
                    lv = lev[ts, c]
                    v = np.float64(x[ts, c])
                    if lv != 0 and lv <= qq:
                        v = thr
                    if lv == LEV_INVALID:
                        v = 0.0
                    s[c] -= v
            if j >= 0 and k < nr:
                for c in range(m):
                    if s[c] > lim:
                        last[c] = k
            if j >= 0:
                tj = rows[j]
                for c in range(m):
                    if last[c] >= j and lev[tj, c] == LEV_FREE:
                        lev[tj, c] = newlev
            # the level written at row j (newlev) is not read again in this pass:
            # rows j - M .. are behind the window, newlev > q is "free" above.


@njit(**_opts)
def st_line(v, lv, nv, chi1, rho, npass, q0):
    """SumThreshold passes q0 .. npass on one gathered line v[:nv], levels lv[:nv]
    (no invalid samples in it), updating lv in place."""
    for q in range(q0, npass + 1):
        M = 1 << (q - 1)
        thr = chi1 / rho ** (q - 1)
        lim = M * thr
        s = 0.0
        last = -1
        for k in range(nv + M - 1):
            j = k - M + 1
            if k < nv:
                a = lv[k]
                s += thr if (a != 0 and a <= q) else np.float64(v[k])
            if k >= M:
                a = lv[k - M]
                s -= thr if (a != 0 and a <= q) else np.float64(v[k - M])
            if j >= 0 and k < nv and s > lim:
                last = k
            if j >= 0 and last >= j and lv[j] == LEV_FREE:
                lv[j] = q + 1


@njit(**_opts)
def st_columns_scalar(x, lev, cols, chi1, rho, npass, q0):
    """Redo columns ``cols`` along axis 0 one by one, leaving invalid samples out:
    levels written by earlier passes >= q0 are first reset to free."""
    n, m = x.shape
    v = np.empty(n, np.float32)
    lv = np.empty(n, np.uint8)
    idx = np.empty(n, np.int64)
    for ci in range(cols.shape[0]):
        c = cols[ci]
        nv = 0
        for t in range(n):
            a = lev[t, c]
            if a != LEV_INVALID:
                if a > q0:          # written by a pass >= q0 of the vector loop
                    a = LEV_FREE
                    lev[t, c] = a
                v[nv] = x[t, c]
                lv[nv] = a
                idx[nv] = t
                nv += 1
        st_line(v, lv, nv, chi1, rho, npass, q0)
        for k in range(nv):
            lev[idx[k], c] = lv[k]


@njit(**_opts)
def detections(lev_t, lev_ft, out):
    """out = detected along time (lev_t) or along frequency (lev_ft, transposed)."""
    n, m = lev_t.shape
    for t0 in range(0, n, _TILE):
        t1 = min(t0 + _TILE, n)
        for c0 in range(0, m, _TILE):
            c1 = min(c0 + _TILE, m)
            for t in range(t0, t1):
                for c in range(c0, c1):
                    a = lev_t[t, c]
                    b = lev_ft[c, t]
                    out[t, c] = (a >= 2 and a != LEV_INVALID) or (b >= 2 and b != LEV_INVALID)


@njit(**_opts)
def strided_sample(x, exclude, step, out):
    """Copy x.flat[0::step] where not excluded into out; returns the count."""
    xf = x.ravel()
    ef = exclude.ravel()
    k = 0
    for i in range(0, xf.shape[0], step):
        if not ef[i]:
            v = xf[i]
            if v == v:
                out[k] = v
                k += 1
    return k


# ---------------------------------------------------------------------------- SIR
@njit(**_opts)
def sir_rows(mask, eta, out):
    """SIR operator along axis 1 of a bool plane, into ``out``.

    w_i = eta - 1 + f_i, W(0) = 0, W(k) = sum_{i<k} w_i; sample y is flagged iff
    max_{Y2 > y} W(Y2) - min_{Y1 <= y} W(Y1) >= 0 (a tolerance of 1e-9 absorbs
    rounding of the prefix sums)."""
    n, m = mask.shape
    W = np.empty(m + 1)
    smax = np.empty(m + 1)
    tol = 1e-9
    for t in range(n):
        W[0] = 0.0
        acc = 0.0
        for i in range(m):
            acc += (eta - 1.0) + (1.0 if mask[t, i] else 0.0)
            W[i + 1] = acc
        smax[m] = W[m]
        for k in range(m - 1, -1, -1):
            smax[k] = max(W[k], smax[k + 1])
        pmin = np.inf
        for y in range(m):
            pmin = min(pmin, W[y])
            out[t, y] = smax[y + 1] - pmin >= -tol


@njit(**_opts)
def _box_rows5(p, tmp, m, r):
    """Zero-padded box sums of half-width r along the 5 rows of p (float64
    (5, m)), using tmp (5, m + 1) for the prefix sums."""
    for k in range(5):
        tmp[k, 0] = 0.0
    u0 = 0.0
    u1 = 0.0
    u2 = 0.0
    u3 = 0.0
    u4 = 0.0
    for c in range(m):
        u0 += p[0, c]
        u1 += p[1, c]
        u2 += p[2, c]
        u3 += p[3, c]
        u4 += p[4, c]
        tmp[0, c + 1] = u0
        tmp[1, c + 1] = u1
        tmp[2, c + 1] = u2
        tmp[3, c + 1] = u3
        tmp[4, c + 1] = u4
    for k in range(5):
        for c in range(m):
            hi = min(c + r + 1, m)
            lo = max(c - r, 0)
            p[k, c] = tmp[k, hi] - tmp[k, lo]


@njit(**_opts)
def freq_local_linear(num, den, radii, out):
    """Background along axis 1 by a weighted local straight-line fit.

    For each sample, with the (time-smoothed) weights den = T(w), data num =
    T(w x) and the box-cascade kernel K along channels, fit a + b (c' - c) by
    weighted least squares and return a:
    B = (s2 X0 - s1 X1) / (M0 s2 - s1**2), with M0 = S(T(w)), s1, s2 the first
    and second central moments of the channel offset and X0, X1 those of the
    data.  Where the weights' spread of channel offsets is below 0.1 channel**2
    (a single channel holds them) the order-zero value X0 / M0 is used; where
    M0 = 0, NaN.  Returns the NaN count."""
    n, m = num.shape
    p = np.empty((5, m))
    tmp = np.empty((5, m + 1))
    bad = 0
    for t in range(n):
        for c in range(m):
            w = np.float64(den[t, c])
            z = np.float64(num[t, c])
            cc = np.float64(c)
            p[0, c] = w
            p[1, c] = w * cc
            p[2, c] = w * cc * cc
            p[3, c] = z
            p[4, c] = z * cc
        for r in radii:
            _box_rows5(p, tmp, m, r)
        for c in range(m):
            m0 = p[0, c]
            if not m0 > 0.0:
                out[t, c] = np.nan
                bad += 1
                continue
            cc = np.float64(c)
            s1 = p[1, c] - cc * m0
            s2 = p[2, c] - 2.0 * cc * p[1, c] + cc * cc * m0
            x0 = p[3, c]
            x1 = p[4, c] - cc * x0
            det = m0 * s2 - s1 * s1
            if det > 0.1 * m0 * m0:
                out[t, c] = (s2 * x0 - s1 * x1) / det
            else:
                out[t, c] = x0 / m0
    return bad

"""Compiled (numba) inner loops of the SumThreshold flagger, the background fit
and the SIR operator.

Everything here works on C-contiguous 2-D planes ``(time, channel)`` and is
compiled with ``nogil=True`` (so dask threads run in parallel) and ``cache=True``.
The public, documented entry points are in :mod:`rfisieve.detect.background`,
:mod:`rfisieve.detect.sumthreshold` and :mod:`rfisieve.detect.growth`; the functions here
check nothing and may overwrite their output arguments.

Loop shapes:

* SumThreshold sums integers: its planes are on the grid of :func:`to_grid`
  (:func:`rfisieve.detect.sumthreshold.grid_unit`), so window sums are exact and run in
  32-bit lanes;
* along axis 0 (time, the strided axis): one running quantity per channel and an
  inner loop over the contiguous channel axis, which the compiler vectorises.
  SumThreshold along time (:func:`st_time_pipe`) runs all its window passes in
  one sweep down the dumps with a ring buffer of levels, so the plane is read
  about once per direction instead of once per window;
* along axis 1 (channel, the contiguous axis): SumThreshold gathers tiles of
  dumps transposed (8 dumps at a time) into a cache-resident buffer and runs all
  window passes on it in one sweep as along time (:func:`st_freq`,
  :func:`_tile_sweep`); the frequency pass takes the time pass's detections
  as flagged;
* the background is fitted on a coarse grid of cells (:func:`cell_moments`,
  :func:`box_axis0_f64`, :func:`coarse_solve`, the last on blocks of coarse
  rows transposed so the frequency boxes vectorise) and interpolated back
  fused with the residual (:func:`coarse_interp`);
* avoid 1-D row views inside hot loops over short rows: each view costs
  atomic reference counting (index 2-D arrays directly).
"""

import numpy as np
from rfisieve.detect._jit import njit


# Levels in the SumThreshold working array (uint8):
LEV_FREE = 0        # not flagged
LEV_INPUT = 1       # flagged on input
LEV_INVALID = 255   # invalid: left out of every sum
# a detection by pass q (window 2**(q-1)) is stored as q + 1 (2 .. 254)

_opts = dict(nogil=True, cache=True, fastmath=False, error_model="numpy", boundscheck=False)


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
def _on_grid(x, scale, lo, hi):
    """rint(clip(x * scale, lo, hi)) in float64, NaN to lo."""
    v = np.float64(x) * scale
    v = v if v > lo else lo
    v = v if v < hi else hi
    return np.rint(v)


@njit(**_opts)
def to_grid(x, scale, lo, hi, out):
    """SumThreshold's integer grid: out = rint(clip(x * scale, lo, hi)) in
    float64 (NaN to lo), into the integer plane out."""
    n, m = x.shape
    for t in range(n):
        for c in range(m):
            out[t, c] = _on_grid(x[t, c], scale, lo, hi)


@njit(**_opts)
def grid_thresholds(unit, rho, npass, thrs, lims):
    """thrs[q] = rint(unit / rho**(q - 1)) (chi_M on the grid, M = 2**(q - 1)) and
    lims[q] = M thrs[q], q = 1 .. npass (integer arrays of length npass + 1)."""
    thrs[0] = 0
    lims[0] = 0
    for q in range(1, npass + 1):
        thrs[q] = np.rint(unit / rho ** (q - 1))
        lims[q] = (1 << (q - 1)) * thrs[q]


@njit(**_opts)
def st_line(v, lv, nv, thrs, npass, q0):
    """SumThreshold passes q0 .. npass on one gathered line v[:nv] (on the grid of
    :func:`to_grid`, thresholds thrs[q] from :func:`grid_thresholds`), levels
    lv[:nv] (no invalid samples in it), updating lv in place.  Sums in int64:
    exact, so equal to the 32-bit sums of the sweeps (which cannot overflow)."""
    for q in range(q0, npass + 1):
        M = 1 << (q - 1)
        thr = np.int64(thrs[q])
        lim = M * thr
        s = np.int64(0)
        last = -1
        for k in range(nv + M - 1):
            j = k - M + 1
            if k < nv:
                a = lv[k]
                s += thr if (a != 0 and a <= q) else np.int64(v[k])
            if k >= M:
                a = lv[k - M]
                s -= thr if (a != 0 and a <= q) else np.int64(v[k - M])
            if j >= 0 and k < nv and s > lim:
                last = k
            if j >= 0 and last >= j and lv[j] == LEV_FREE:
                lv[j] = q + 1


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
    (5, m)), using tmp (5, m + 1) for the prefix sums P: out[c] = P[min(c + r +
    1, m)] - P[max(c - r, 0)], with the head, body and tail of the row in
    separate loops (the body vectorises)."""
    u0 = 0.0
    u1 = 0.0
    u2 = 0.0
    u3 = 0.0
    u4 = 0.0
    for k in range(5):
        tmp[k, 0] = 0.0
    for c in range(m):                  # five interleaved chains
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
    lo_end = min(r, m)                  # c < r: lower end clipped at 0
    hi_start = max(m - r - 1, lo_end)   # c >= m - r - 1: upper end clipped at m
    for k in range(5):
        for c in range(lo_end):
            p[k, c] = tmp[k, min(c + r + 1, m)]
        for c in range(lo_end, hi_start):
            p[k, c] = tmp[k, c + r + 1] - tmp[k, c - r]
        for c in range(hi_start, m):
            p[k, c] = tmp[k, m] - tmp[k, max(c - r, 0)]


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


# ------------------------------------------------- SumThreshold on cache-resident tiles
_TILE_BYTES = 2048 * 1024  # SumThreshold tile budget (5 bytes per sample): about the L2 of a core


def tile_width(L):
    """Lines per SumThreshold tile for lines of L samples: the largest multiple of
    16 (at most 128, at least 16) whose tile fits in _TILE_BYTES."""
    b = (_TILE_BYTES // (5 * max(int(L), 1))) // 16 * 16
    return int(min(128, max(16, b)))


@njit(**_opts)
def _pipe_lags(npass):
    """Lags of the one-sweep SumThreshold (:func:`st_time_pipe`): lag[q] dumps
    pass q trails the load; returns (lag, final lag, ring length R, a power of
    two)."""
    lag = np.zeros(npass + 2, np.int64)
    for q in range(3, npass + 1):
        lag[q] = lag[q - 1] + (1 << (q - 2)) - 1
    Mmax = 1 << max(npass - 1, 0)
    final_lag = (lag[npass] if npass >= 2 else 0) + Mmax - 1
    R = 1
    while R < final_lag + 2:
        R *= 2
    return lag, final_lag, R


@njit(inline="always", **_opts)
def _sweep_passes(x, rows, K, L, ring, s, last, thrs, lims, npass, lag, RM):
    """Step K of the one-sweep SumThreshold shared by :func:`st_time_pipe` (lines
    are the channels of a plane, ``rows`` the dumps) and :func:`_tile_sweep`
    (lines are a tile's columns, ``rows`` the identity): passes q = 2 .. npass,
    pass q at line position K - lag[q], on the levels in the ring buffer (the
    position's value is x[rows[k], c]).  Window sums run at s's width (exact on the
    grid); last[q, c] holds the last position whose window of pass q exceeded its
    limit; windows ending at j = kq - M + 1 and later mark free samples with level
    q + 1.  Plain 2-D indexing (no row views: their reference counting would cost
    more than the wide loops)."""
    m = x.shape[1]
    one = np.uint8(1)
    zero = np.uint8(0)
    for q in range(2, npass + 1):
        kq = K - lag[q]
        M = 1 << (q - 1)
        if kq < 0 or kq >= L + M - 1:
            continue
        thr = thrs[q]
        lim = lims[q]
        qm = np.uint8(q - 1)
        newlev = np.uint8(q + 1)
        j = kq - M + 1
        kq32 = np.int32(kq)
        j32 = np.int32(j)
        if kq < L and kq >= M:
            ka = kq & RM
            ta = rows[kq]
            ko = (kq - M) & RM
            to = rows[kq - M]
            for c in range(m):
                a = ring[ka, c]
                u = thr if np.uint8(a - one) <= qm else x[ta, c]
                a2 = ring[ko, c]
                o = thr if np.uint8(a2 - one) <= qm else x[to, c]
                s[q, c] = s[q, c] + u - o          # stored at s's width: exact
                last[q, c] = kq32 if s[q, c] > lim else last[q, c]
        elif kq < L:
            ka = kq & RM
            ta = rows[kq]
            for c in range(m):
                a = ring[ka, c]
                s[q, c] = s[q, c] + (thr if np.uint8(a - one) <= qm else x[ta, c])
            if j >= 0:
                for c in range(m):
                    last[q, c] = kq32 if s[q, c] > lim else last[q, c]
        if j >= 0:
            kj = j & RM
            for c in range(m):
                a = ring[kj, c]
                ring[kj, c] = newlev if (last[q, c] >= j32 and a == zero) else a


@njit(**_opts)
def _tile_sweep(v, lv, L, thrs, lims, npass, lag, final_lag, ring, s, last, ident_rows):
    """All SumThreshold passes q = 1 .. npass along axis 0 of the tile v[:L, :B]
    (lines are the B columns, no invalid sample) in one sweep, as
    :func:`st_time_pipe` does on a plane (:func:`_sweep_passes`); the final levels
    are written back to lv[:L] (0 free, 1 input-flagged, q + 1 detected by pass
    q).  v is on the grid of :func:`to_grid`, thrs and lims (M thrs) from
    :func:`grid_thresholds`; ring (R, B) uint8, s (npass + 1, B) of v's dtype,
    last (npass + 1, B) int32 are scratch; ident_rows = 0, 1, 2, ... (>= L)."""
    B = v.shape[1]
    RM = ring.shape[0] - 1
    two = np.uint8(2)
    zero = np.uint8(0)
    c1 = thrs[1]
    for q in range(npass + 1):
        for b in range(B):
            s[q, b] = 0
            last[q, b] = -1
    for K in range(L + final_lag):
        if K < L:
            kr = K & RM
            for b in range(B):
                a = lv[K, b]
                if npass >= 1:
                    a = two if (a == zero and v[K, b] > c1) else a
                ring[kr, b] = a
        _sweep_passes(v, ident_rows, K, L, ring, s, last, thrs, lims, npass, lag, RM)
        r = K - final_lag
        if r >= 0:
            kr = r & RM
            for b in range(B):
                lv[r, b] = ring[kr, b]


@njit(**_opts)
def _line_scalar(x, lev0, line, along_time, thrs, npass, v, lvl, idx):
    """SumThreshold of one line holding invalid samples (left out): returns the
    count nv; idx[:nv] the positions, lvl[:nv] the final levels."""
    nv = 0
    if along_time:
        n = x.shape[0]
        for t in range(n):
            a = lev0[t, line]
            if a != LEV_INVALID:
                v[nv] = x[t, line]
                lvl[nv] = a
                idx[nv] = t
                nv += 1
    else:
        m = x.shape[1]
        for c in range(m):
            a = lev0[line, c]
            if a != LEV_INVALID:
                v[nv] = x[line, c]
                lvl[nv] = a
                idx[nv] = c
                nv += 1
    st_line(v, lvl, nv, thrs, npass, 1)
    return nv


@njit(**_opts)
def _gather(x, lev0, det, cols, ident, merge, t0, nb, L, v, lv):
    """Tile gather: v[k, b], lv[k, b] from dump t0 + b, channel cols[k] (k when
    ident); zero lanes b >= nb.  Groups of 8 dumps are swept along the channels
    (8 rows of each plane in L1, every cache line read once; rows of the
    float32 plane are 4 KiB apart, so more than 8 of them at once would evict
    each other from their one L1 set)."""
    B = v.shape[1]
    zero = np.uint8(0)
    inv = np.uint8(LEV_INVALID)
    du = det.view(np.uint8)
    mflag = np.uint8(1 if merge else 0)
    for b0 in range(0, nb, 8):
        bw = min(8, nb - b0)
        if bw == 8:
            for k in range(L):
                c = k if ident else cols[k]
                for i in range(8):
                    t = t0 + b0 + i
                    a = lev0[t, c]
                    a = a | (du[t, c] & mflag & np.uint8(a == zero))   # branch-free
                    lv[k, b0 + i] = a
                    v[k, b0 + i] = 0 if a == inv else x[t, c]
        else:
            for k in range(L):
                c = k if ident else cols[k]
                for i in range(bw):
                    t = t0 + b0 + i
                    a = lev0[t, c]
                    a = a | (du[t, c] & mflag & np.uint8(a == zero))
                    lv[k, b0 + i] = a
                    v[k, b0 + i] = 0 if a == inv else x[t, c]
    for k in range(L):
        for b in range(nb, B):
            lv[k, b] = zero
            v[k, b] = 0


@njit(**_opts)
def _scatter(lv, det, cols, ident, merge, partial, t0, nb, L):
    """Tile scatter: the detections of lv (levels 2 .. 254) into det (|= when
    merge), skipping dumps with ``partial`` True.  Groups of 8 dumps are swept
    along the channels, as in :func:`_gather` (8 rows of det in L1, each row of
    lv read 8 bytes at a time); branch-free."""
    inv = np.uint8(LEV_INVALID)
    two = np.uint8(2)
    du = det.view(np.uint8)
    keep = np.uint8(1 if merge else 0)
    for b0 in range(0, nb, 8):
        bw = min(8, nb - b0)
        whole = bw == 8
        if whole:
            for i in range(8):
                if partial[t0 + b0 + i]:
                    whole = False
        if whole:
            for k in range(L):
                c = k if ident else cols[k]
                for i in range(8):
                    t = t0 + b0 + i
                    a = lv[k, b0 + i]
                    d = np.uint8(a >= two) & np.uint8(a != inv)
                    du[t, c] = (du[t, c] & keep) | d
        else:
            for k in range(L):
                c = k if ident else cols[k]
                for i in range(bw):
                    t = t0 + b0 + i
                    if partial[t]:
                        continue
                    a = lv[k, b0 + i]
                    d = np.uint8(a >= two) & np.uint8(a != inv)
                    du[t, c] = (du[t, c] & keep) | d


@njit(**_opts)
def st_freq(x, lev0, cols, partial, thrs, lims, npass, det, merge, B):
    """SumThreshold passes 1 .. npass along frequency (axis 1), conventions of
    :func:`st_time_pipe`, on the levels lev0 joined by det when ``merge`` (the
    samples det marks enter as flagged: the time pass's detections), then
    det |= d; when not ``merge``, det = d.  Tiles of B dumps are gathered
    (transposed, 8 dumps at a time) over the channel list ``cols`` (channels not
    wholly invalid) into a cache-resident buffer and run in one sweep by
    :func:`_tile_sweep`; dumps with ``partial`` True are redone line by line."""
    n, m = x.shape
    L = cols.shape[0]
    ident = L == m
    v = np.zeros((max(L, 1), B), x.dtype)
    lv = np.empty((max(L, 1), B), np.uint8)
    lag, final_lag, R = _pipe_lags(npass)
    ring = np.zeros((R, B), np.uint8)
    s = np.empty((npass + 1, B), x.dtype)
    last = np.empty((npass + 1, B), np.int32)
    ident_rows = np.arange(max(L, 1), dtype=np.int64)
    one = np.uint8(LEV_INPUT)
    zero = np.uint8(0)
    inv = np.uint8(LEV_INVALID)
    for t0 in range(0, n, B):
        nb = min(B, n - t0)
        _gather(x, lev0, det, cols, ident, merge, t0, nb, L, v, lv)
        _tile_sweep(v, lv, L, thrs, lims, npass, lag, final_lag, ring, s, last, ident_rows)
        _scatter(lv, det, cols, ident, merge, partial, t0, nb, L)
    vv = np.empty(m, x.dtype)
    ll = np.empty(m, np.uint8)
    idx = np.empty(m, np.int64)
    for t in range(n):
        if partial[t]:
            nv = 0
            for c in range(m):
                a = lev0[t, c]
                if a != inv:
                    vv[nv] = x[t, c]
                    ll[nv] = one if (merge and det[t, c] and a == zero) else a
                    idx[nv] = c
                    nv += 1
            st_line(vv, ll, nv, thrs, npass, 1)
            if not merge:
                for c in range(m):
                    if lev0[t, c] == inv:
                        det[t, c] = False
            for k in range(nv):
                a = ll[k]
                d = a >= 2 and a != inv
                if merge:
                    det[t, idx[k]] |= d
                else:
                    det[t, idx[k]] = d


# ------------------------------------------------------------- coarse background fit
@njit(**_opts)
def cell_moments(x, ex1, ex2, ct, cf, off, mom):
    """Sums over cells of ct dumps x cf channels of the samples excluded by
    neither ex1 nor ex2: mom[i, :, j] = (sum w, sum w c, sum w c**2, sum w x,
    sum w x c), c the absolute channel index (float64).  mom is overwritten.
    Cell row i holds dumps i ct - off .. (i + 1) ct - off - 1 (clipped to the
    plane; 0 <= off < ct aligns the cells to absolute dump numbers).
    Per-channel sums over the ct dumps of a cell row first (vectorised), then
    the channel moments of those column sums."""
    n, m = x.shape
    ntc, _, nfc = mom.shape
    aw = np.empty(m, np.float32)        # counts (exact)
    ax = np.empty(m)
    e1 = ex1.view(np.uint8)
    e2 = ex2.view(np.uint8)
    f1 = np.float32(1.0)
    f0 = np.float32(0.0)
    for i in range(ntc):
        for c in range(m):
            aw[c] = f0
            ax[c] = 0.0
        for t in range(max(i * ct - off, 0), min((i + 1) * ct - off, n)):
            for c in range(m):
                keep = (e1[t, c] | e2[t, c]) == 0     # no short-circuit: vectorises
                aw[c] += f1 if keep else f0
                ax[c] += np.float64(x[t, c]) if keep else 0.0
        for j in range(nfc):
            w0 = 0.0
            w1 = 0.0
            w2 = 0.0
            z0 = 0.0
            z1 = 0.0
            for c in range(j * cf, min((j + 1) * cf, m)):
                cc = np.float64(c)
                w = np.float64(aw[c])
                z = ax[c]
                w0 += w
                w1 += w * cc
                w2 += w * cc * cc
                z0 += z
                z1 += z * cc
            mom[i, 0, j] = w0
            mom[i, 1, j] = w1
            mom[i, 2, j] = w2
            mom[i, 3, j] = z0
            mom[i, 4, j] = z1


@njit(**_opts)
def box_axis0_f64(a, r, out, s):
    """Zero-padded running box sums of half-width r along axis 0 of the float64
    plane a into out (no aliasing); s: float64 scratch of length a.shape[1]."""
    n, m = a.shape
    for c in range(m):
        s[c] = 0.0
    for t in range(min(r, n)):
        for c in range(m):
            s[c] += a[t, c]
    for t in range(n):
        ad = t + r
        su = t - r - 1
        if ad < n:
            for c in range(m):
                s[c] += a[ad, c]
        if su >= 0:
            for c in range(m):
                s[c] -= a[su, c]
        for c in range(m):
            out[t, c] = s[c]


_SOLVE_ROWS = 8   # coarse rows solved together (5 moments each: 40 lanes)


@njit(**_opts)
def coarse_solve(mom, radii, cf, out):
    """Local straight-line fit along channels on the coarse grid: per coarse row
    i, box-smooth the 5 moments mom[i] along the cell axis (zero-padded running
    boxes of half-widths ``radii``) and evaluate the weighted least-squares line
    at the cell centre P_j = j cf + (cf - 1) / 2 (the formula of
    :func:`freq_local_linear`, order zero where the weights span less than 0.1
    channel**2, NaN where none).  _SOLVE_ROWS rows at a time are copied
    transposed (cell, row x moment) so that the running boxes are vectorised
    over rows and moments.  Returns the NaN count."""
    ntc, _, nfc = mom.shape
    W = 5 * _SOLVE_ROWS
    a = np.empty((nfc, W))
    b = np.empty((nfc, W))
    sm = np.empty(W)
    half = 0.5 * (cf - 1)
    bad = 0
    for i0 in range(0, ntc, _SOLVE_ROWS):
        ib = min(_SOLVE_ROWS, ntc - i0)
        for j in range(nfc):
            for ii in range(ib):
                for k in range(5):
                    a[j, ii * 5 + k] = mom[i0 + ii, k, j]
        w = ib * 5
        for r in radii:
            for q in range(w):
                sm[q] = 0.0
            for j in range(min(r, nfc)):
                for q in range(w):
                    sm[q] += a[j, q]
            for j in range(nfc):
                ad = j + r
                su = j - r - 1
                if ad < nfc:
                    for q in range(w):
                        sm[q] += a[ad, q]
                if su >= 0:
                    for q in range(w):
                        sm[q] -= a[su, q]
                for q in range(w):
                    b[j, q] = sm[q]
            a, b = b, a
        for ii in range(ib):
            i = i0 + ii
            o = ii * 5
            for j in range(nfc):        # branch-free
                m0 = a[j, o]
                P = np.float64(j * cf) + half
                s1 = a[j, o + 1] - P * m0
                s2 = a[j, o + 2] - 2.0 * P * a[j, o + 1] + P * P * m0
                x0 = a[j, o + 3]
                x1 = a[j, o + 4] - P * x0
                det = m0 * s2 - s1 * s1
                lin = det > 0.1 * m0 * m0
                num = (s2 * x0 - s1 * x1) if lin else x0
                den = det if lin else m0
                out[i, j] = num / den if m0 > 0.0 else np.nan
            for j in range(nfc):
                bad += 0 if a[j, o] > 0.0 else 1
    return bad


@njit(**_opts)
def coarse_interp(G, ct, cf, off, x, lev0, out, mode, H, scale=1.0, lo=0.0, hi=0.0):
    """Bilinear interpolation of the coarse grid G (nodes at dump i ct - off + (ct - 1)/2,
    channel j cf + (cf - 1)/2; held constant beyond the outer nodes along time,
    extrapolated linearly along channels) to the full plane, rounded to float32
    as B: first along channels for every node row (into the float64 scratch H,
    shape (G.shape[0], out.shape[1])), then along time per dump.  mode 0:
    out = B.  mode 1: out = r = x / B - 1 (float32), 0 where lev0 is invalid.
    mode 2: out (an integer plane) = r on SumThreshold's grid, exactly as
    :func:`to_grid` (r, scale, lo, hi, out) would put it, without storing r."""
    n, m = out.shape
    ntc, nfc = G.shape
    hf = 0.5 * (cf - 1)
    kk = np.zeros(m, np.int64)
    ff = np.zeros(m)
    if nfc > 1:
        for c in range(m):
            a = (c - hf) / cf
            k = int(np.floor(a))
            k = min(max(k, 0), nfc - 2)
            kk[c] = k
            ff[c] = a - k
    for i in range(ntc):                # row by row (contiguous writes)
        if nfc == 1:
            for c in range(m):
                H[i, c] = G[i, 0]
        else:
            for c in range(m):
                k = kk[c]
                g0 = G[i, k]
                H[i, c] = g0 + ff[c] * (G[i, k + 1] - g0)
    ht = 0.5 * (ct - 1)
    one = np.float32(1.0)
    zero = np.float32(0.0)
    for t in range(n):
        a = (t + off - ht) / ct
        if ntc == 1 or a <= 0.0:
            i0 = 0
            ft = 0.0
        elif a >= ntc - 1:
            i0 = ntc - 1
            ft = 0.0
        else:
            i0 = int(np.floor(a))
            ft = a - i0
        h0 = H[i0]
        h1 = H[min(i0 + 1, ntc - 1)]
        xt = x[t]
        ot = out[t]
        if mode == 1:
            lt = lev0[t]
            for c in range(m):
                bg = np.float32(h0[c] + ft * (h1[c] - h0[c]))
                vv = xt[c] / bg - one
                ot[c] = zero if lt[c] == LEV_INVALID else vv
        elif mode == 2:
            lt = lev0[t]
            for c in range(m):
                bg = np.float32(h0[c] + ft * (h1[c] - h0[c]))
                vv = xt[c] / bg - one
                ot[c] = _on_grid(zero if lt[c] == LEV_INVALID else vv, scale, lo, hi)
        else:
            for c in range(m):
                ot[c] = np.float32(h0[c] + ft * (h1[c] - h0[c]))


@njit(**_opts)
def strided_sample2(x, ex1, ex2, step, out):
    """As :func:`strided_sample`, excluding where ex1 or ex2."""
    xf = x.ravel()
    e1 = ex1.ravel()
    e2 = ex2.ravel()
    k = 0
    for i in range(0, xf.shape[0], step):
        if not (e1[i] or e2[i]):
            v = xf[i]
            if v == v:
                out[k] = v
                k += 1
    return k


@njit(**_opts)
def st_time_pipe(x, lev0, rows, partial, thrs, lims, npass, det, merge):
    """SumThreshold passes 1 .. npass along time (axis 0) of the plane x with
    input levels lev0 (0 free, 1 flagged, 255 invalid), over the dump list
    ``rows`` (dumps not wholly invalid).  Channels with ``partial`` True hold
    invalid samples in those dumps and are redone line by line, invalid samples
    left out.  Detections go to det (det = d, or det |= d when ``merge``); det
    is not written at dumps outside ``rows`` (the caller clears it).

    All passes run in one sweep down the dumps, vectorised over all channels, pass q lagging pass
    q - 1 by M_{q-1} - 1 dumps (the dumps pass q reads are final for the passes
    before it; the levels pass q writes, q + 1, read as free in later-started
    windows of the earlier passes, as they would in sequence).  The levels of
    the last dumps (lag of the last pass plus its window: 59 dumps for windows
    up to 32) live in a ring buffer, so each dump is read from memory about
    once."""
    n, m = x.shape
    L = rows.shape[0]
    lag, final_lag, R = _pipe_lags(npass)     # lag[q]: dumps pass q trails the load
    RM = R - 1
    ring = np.zeros((R, m), np.uint8)
    s = np.zeros((max(npass, 1) + 1, m), x.dtype)
    last = np.full((max(npass, 1) + 1, m), -1, np.int32)
    two = np.uint8(2)
    zero = np.uint8(0)
    c1 = thrs[1]
    for K in range(L + final_lag):
        if K < L:
            t = rows[K]
            kr = K & RM
            for c in range(m):
                a = lev0[t, c]
                if npass >= 1:
                    a = two if (a == zero and x[t, c] > c1) else a
                ring[kr, c] = a
        _sweep_passes(x, rows, K, L, ring, s, last, thrs, lims, npass, lag, RM)
        r = K - final_lag
        if r >= 0:
            t = rows[r]
            kr = r & RM
            for c in range(m):
                a = ring[kr, c]
                d = a >= 2 and a != LEV_INVALID and not partial[c]
                if merge:
                    det[t, c] |= d
                else:
                    det[t, c] = d
    vv = np.empty(n, x.dtype)
    ll = np.empty(n, np.uint8)
    idx = np.empty(n, np.int64)
    for c in range(m):
        if partial[c]:
            nv = _line_scalar(x, lev0, c, True, thrs, npass, vv, ll, idx)
            if not merge:
                for t in range(n):
                    if lev0[t, c] == LEV_INVALID:
                        det[t, c] = False
            for k in range(nv):
                a = ll[k]
                d = a >= 2 and a != LEV_INVALID
                if merge:
                    det[idx[k], c] |= d
                else:
                    det[idx[k], c] = d




@njit(**_opts)
def init_flagger(x, inv, has_inv, flg, has_flg, lev, ex):
    """Set-up of the flagger in one pass: invalid = x not finite, or ``inv``
    (when has_inv); lev = 255 where invalid, 1 where flagged (``flg``, when
    has_flg), 0 elsewhere; ex = invalid or flagged.  Returns the per-row and
    per-column counts of invalid samples (as :func:`init_levels`)."""
    n, m = x.shape
    rowbad = np.zeros(n, np.int64)
    colbad = np.zeros(m, np.int64)
    for t in range(n):
        nb = 0
        for c in range(m):
            v = x[t, c]
            b = not (abs(v) < np.inf)              # NaN or +-Inf
            if has_inv:
                b = b | inv[t, c]
            f = has_flg and flg[t, c]
            lev[t, c] = np.uint8(LEV_INVALID) if b else (np.uint8(LEV_INPUT) if f else np.uint8(0))
            ex[t, c] = b | f
            nb += 1 if b else 0
            colbad[c] += 1 if b else 0
        rowbad[t] = nb
    return rowbad, colbad



@njit(**_opts)
def taps_axis0(a, taps, out, lo, hi):
    """out[t] = sum_k taps[k] a[t - R + k] along axis 0 for rows lo <= t < hi
    (R = len(taps) // 2; the caller keeps t - R >= 0 and t + R < n): the
    interior of a box cascade as one pass of its 2 R + 1 taps.  The products
    are added in order of k (((w0 a0 + w1 a1) + w2 a2) + ...), three taps per
    sweep of the output row."""
    n, m = a.shape
    T = taps.shape[0]
    R = T // 2
    for t in range(lo, hi):
        b = t - R
        w0 = taps[0]
        if T >= 3:
            w1 = taps[1]
            w2 = taps[2]
            for c in range(m):
                out[t, c] = (w0 * a[b, c] + w1 * a[b + 1, c]) + w2 * a[b + 2, c]
            k = 3
        elif T == 2:
            w1 = taps[1]
            for c in range(m):
                out[t, c] = w0 * a[b, c] + w1 * a[b + 1, c]
            k = 2
        else:
            for c in range(m):
                out[t, c] = w0 * a[b, c]
            k = 1
        while k + 3 <= T:
            u0 = taps[k]
            u1 = taps[k + 1]
            u2 = taps[k + 2]
            r0 = b + k
            for c in range(m):
                out[t, c] = ((out[t, c] + u0 * a[r0, c]) + u1 * a[r0 + 1, c]) + u2 * a[r0 + 2, c]
            k += 3
        while k < T:
            u0 = taps[k]
            r0 = b + k
            for c in range(m):
                out[t, c] += u0 * a[r0, c]
            k += 1

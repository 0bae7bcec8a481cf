"""Compiled (numba) inner loops of the background fit and the robust noise estimate
(:mod:`rfisieve.detect.background`).

Everything here works on C-contiguous 2-D planes ``(time, channel)`` and is
compiled with ``nogil=True`` (so dask threads run in parallel) and ``cache=True``;
the functions check nothing and may overwrite their output arguments.

* the full-resolution masked smoothing: running boxes along time
  (:func:`box2_axis0`) and frequency (:func:`box2_axis1`), or the local straight
  line along frequency (:func:`freq_local_linear`);
* the coarse fit: masked moments summed over cells (:func:`cell_moments`), box
  cascade on the cell grid (:func:`box_axis0_f64`, :func:`taps_axis0`), the local
  fits solved on blocks of coarse rows transposed so the frequency boxes vectorise
  (:func:`coarse_solve`), and interpolated back fused with the residual, or with
  the residual put straight onto SumThreshold's grid (:func:`coarse_interp`);
* avoid 1-D row views inside hot loops over short rows: each view costs
  atomic reference counting (index 2-D arrays directly).
"""

import numpy as np
from rfisieve.detect._jit import njit
from rfisieve.detect._sumthreshold_kernels import LEV_INVALID, _on_grid  # noqa: F401 (coarse_interp)

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
            box_axis0_f64(a[:, :w], r, b[:, :w], sm)
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
def strided_sample(x, ex1, ex2, step, out):
    """Copy x.flat[0::step] where neither ex1 nor ex2 is set (and x is not NaN) into out;
    returns the count."""
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

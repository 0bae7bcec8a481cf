"""Compiled (numba) inner loops of :mod:`rfisieve.detect.bandpass`: the per-block
bandpass (medians along time), the running median along frequency, the block means
of the persistence test and the compact-box sums.  They check nothing; the public
entry points are in :mod:`rfisieve.detect.bandpass`."""

import numpy as np

from rfisieve.detect._jit import njit

_opts = dict(nogil=True, cache=True, fastmath=False, error_model="numpy", boundscheck=False)


@njit(**_opts)
def column_medians(x, ex, a, b, out, buf):
    """out[c] = median of x[a:b, c] over rows with ex False (NaN when none).

    Rows are gathered eight channels at a time into ``buf`` (nchan, b - a) so the
    plane is read row by row."""
    m = x.shape[1]
    cnt = np.zeros(m, np.int64)
    for t in range(a, b):
        for c in range(m):
            if not ex[t, c]:
                buf[c, cnt[c]] = x[t, c]
                cnt[c] += 1
    for c in range(m):
        k = cnt[c]
        if k == 0:
            out[c] = np.nan
        else:
            out[c] = np.median(buf[c, :k])


@njit(**_opts)
def fill_nan_1d(v):
    """NaNs of v replaced by linear interpolation between the nearest finite values
    (the nearest one beyond the outermost); all NaN gives 1."""
    n = v.shape[0]
    last = -1
    for i in range(n):
        if v[i] == v[i]:
            if last == -1 and i > 0:
                for j in range(i):
                    v[j] = v[i]
            elif last >= 0 and i - last > 1:
                for j in range(last + 1, i):
                    w = (j - last) / (i - last)
                    v[j] = (1 - w) * v[last] + w * v[i]
            last = i
    if last == -1:
        for i in range(n):
            v[i] = 1.0
    else:
        for j in range(last + 1, n):
            v[j] = v[last]


@njit(**_opts)
def running_median(v, half, out):
    """out[c] = median of v over the symmetric window c - h .. c + h, h = min(half,
    c, n - 1 - c) (shrinking at the ends so the window stays centred: a monotone
    run gives its own value back exactly)."""
    n = v.shape[0]
    buf = np.empty(2 * half + 1)
    for c in range(n):
        h = min(half, c, n - 1 - c)
        k = 0
        for j in range(c - h, c + h + 1):
            buf[k] = v[j]
            k += 1
        out[c] = np.median(buf[:k])


@njit(**_opts)
def divide_rows(x, bp, rowblock, out):
    """out[t, c] = x[t, c] / bp[rowblock[t], c]."""
    n, m = x.shape
    for t in range(n):
        k = rowblock[t]
        for c in range(m):
            out[t, c] = x[t, c] / bp[k, c]


@njit(**_opts)
def block_sums(x, ex, det, a, b, s, cnt):
    """s[c], cnt[c] = sum and count of x[a:b, c] over rows with neither ex nor det."""
    m = x.shape[1]
    for c in range(m):
        s[c] = 0.0
        cnt[c] = 0
    for t in range(a, b):
        for c in range(m):
            if not (ex[t, c] or det[t, c]):
                s[c] += x[t, c]
                cnt[c] += 1


@njit(**_opts)
def box_test(g, lev0, det, dt, df, thr, out):
    """Compact-box test on the grid plane g: every box of dt dumps x df channels
    whose sum over its free samples (lev0 == 0 and not det; others count 0)
    exceeds thr marks its free samples in out.  Returns the number of boxes hit."""
    n, m = g.shape
    rs = np.zeros((dt, m + 1), np.int64)      # ring of per-row prefix sums
    col = np.zeros(m + 1, np.int64)
    hits = 0
    for t in range(n):
        r = t % dt
        acc = 0
        rs[r, 0] = 0
        for c in range(m):
            v = 0
            if lev0[t, c] == 0 and not det[t, c]:
                v = g[t, c]
            acc += v
            rs[r, c + 1] = acc
        if t + 1 < dt:
            continue
        for c in range(m + 1):
            s = 0
            for k in range(dt):
                s += rs[k, c]
            col[c] = s
        for c in range(m - df + 1):
            if col[c + df] - col[c] > thr:
                hits += 1
                for u in range(t - dt + 1, t + 1):
                    for w in range(c, c + df):
                        if lev0[u, w] == 0 and not det[u, w]:
                            out[u, w] = True
    return hits


@njit(**_opts)
def local_quadratic(v, w, half, fallback, out):
    """out[c] = value at c of the weighted least-squares quadratic through v over the
    window c - half .. c + half (clipped at the ends), weights w; ``fallback[c]``
    where the window holds too few weighted points."""
    n = v.shape[0]
    for c in range(n):
        lo = max(0, c - half)
        hi = min(n - 1, c + half)
        s0 = s1 = s2 = s3 = s4 = 0.0
        y0 = y1 = y2 = 0.0
        cnt = 0
        for k in range(lo, hi + 1):
            wk = w[k]
            if wk <= 0:
                continue
            u = (k - c) / (half + 1.0)
            u2 = u * u
            s0 += wk
            s1 += wk * u
            s2 += wk * u2
            s3 += wk * u2 * u
            s4 += wk * u2 * u2
            y0 += wk * v[k]
            y1 += wk * v[k] * u
            y2 += wk * v[k] * u2
            cnt += 1
        if cnt < 6:
            out[c] = fallback[c]
            continue
        # Cramer's rule for [[s0 s1 s2] [s1 s2 s3] [s2 s3 s4]] (a b c) = (y0 y1 y2); a
        det = s0 * (s2 * s4 - s3 * s3) - s1 * (s1 * s4 - s3 * s2) + s2 * (s1 * s3 - s2 * s2)
        if abs(det) < 1e-12 * max(1.0, s0) ** 3:
            out[c] = fallback[c]
            continue
        da = y0 * (s2 * s4 - s3 * s3) - s1 * (y1 * s4 - s3 * y2) + s2 * (y1 * s3 - s2 * y2)
        out[c] = da / det

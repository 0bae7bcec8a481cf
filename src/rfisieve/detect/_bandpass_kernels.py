"""Compiled (numba) inner loops of :mod:`rfisieve.detect.bandpass`: the per-block
bandpass (quantiles along time), the running median along frequency, the block means
of the persistence test and its run ends, the compact-box sums and the edge test.
They check nothing; the public entry points are in :mod:`rfisieve.detect.bandpass`."""

import numpy as np

from rfisieve.detect._jit import njit

_opts = dict(nogil=True, cache=True, fastmath=False, error_model="numpy", boundscheck=False)


@njit(**_opts)
def _select(a, k):
    """The k-th smallest of a[:] (0-based), reordering a (Hoare's quickselect with
    the median of three as pivot)."""
    lo = 0
    hi = a.shape[0] - 1
    while hi > lo:
        mid = (lo + hi) >> 1
        # median of three to a[mid]
        if a[mid] < a[lo]:
            a[mid], a[lo] = a[lo], a[mid]
        if a[hi] < a[lo]:
            a[hi], a[lo] = a[lo], a[hi]
        if a[hi] < a[mid]:
            a[hi], a[mid] = a[mid], a[hi]
        p = a[mid]
        i = lo
        j = hi
        while i <= j:
            while a[i] < p:
                i += 1
            while a[j] > p:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            return a[k]
    return a[k]


@njit(**_opts)
def median_inplace(a):
    """Median of a[:] (mean of the two middle values for an even count, as
    numpy.median), reordering a."""
    n = a.shape[0]
    h = n // 2
    hi = _select(a, h)
    if n % 2:
        return hi
    lo = a[0]
    for i in range(1, h):
        if a[i] > lo:
            lo = a[i]
    return 0.5 * (lo + hi)


@njit(**_opts)
def quantile_inplace(a, q):
    """The q-quantile of a[:] with linear interpolation between order statistics
    (numpy.quantile's default: position q (n - 1)), reordering a; q = 0.5 is the
    median of :func:`median_inplace`."""
    n = a.shape[0]
    pos = q * (n - 1)
    k = int(np.floor(pos))
    lo = _select(a, k)
    w = pos - k
    if w == 0.0 or k + 1 >= n:
        return lo
    hi = a[k + 1]
    for i in range(k + 2, n):     # after the select, a[k + 1:] hold the larger values
        if a[i] < hi:
            hi = a[i]
    return lo + w * (hi - lo)


@njit(**_opts)
def column_quantiles(x, ex, a, b, q, out, buf):
    """out[c] = q-quantile (:func:`quantile_inplace`) of x[a:b, c] over rows with ex
    False (NaN when none).

    The rows are copied transposed in tiles of 64 x 64 (cache-friendly) into
    ``buf`` (nchan, >= b - a), the valid values of each channel first."""
    m = x.shape[1]
    cnt = np.zeros(m, np.int64)
    T = 64
    for t0 in range(a, b, T):
        t1 = min(b, t0 + T)
        for c0 in range(0, m, T):
            c1 = min(m, c0 + T)
            for t in range(t0, t1):
                for c in range(c0, c1):
                    if not ex[t, c]:
                        buf[c, cnt[c]] = x[t, c]
                        cnt[c] += 1
    for c in range(m):
        k = cnt[c]
        if k == 0:
            out[c] = np.nan
        else:
            out[c] = quantile_inplace(buf[c, :k], q)


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
        out[c] = median_inplace(buf[:k])


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
def box_test(g, lev0, det, shapes, thrs, rest, out):
    """Compact-box test on the grid plane g, all shapes in one sweep down the dumps:
    every box of shapes[k] = (dt, df) dumps x channels whose sum over its free
    samples (lev0 == 0 and not det; others count 0) exceeds thrs[k], and whose sum
    less its largest free sample exceeds rest[k], marks its free samples in out.
    Returns the number of boxes hit.

    Per dump t a ring holds the last D rows' free values; the column sums of the
    boxes ending at t grow one row at a time (dt = 1, 2, ..., D), and each shape's
    box sums are the sums of df neighbouring column sums (exact integer sums in the
    grid's type: a box of up to 18 samples on the int32 grid of
    :func:`rfisieve.detect.sumthreshold.grid_unit` stays within 2**28).  Every loop
    over the channels is a plain array loop (no running prefix sum), which the
    compiler vectorises."""
    n, m = g.shape
    D = 1
    for k in range(shapes.shape[0]):
        D = max(D, shapes[k, 0])
    has = np.zeros(D + 1, np.bool_)
    for k in range(shapes.shape[0]):
        has[shapes[k, 0]] = True
    ring = np.zeros((D, m), g.dtype)        # free values of the last D rows
    col = np.zeros(m, g.dtype)              # column sums of the dt rows ending at t
    box = np.zeros(m, g.dtype)              # box sums of one shape, by first channel
    hits = 0
    for t in range(n):
        r = t % D
        for c in range(m):
            free = lev0[t, c] == 0 and not det[t, c]
            ring[r, c] = g[t, c] if free else 0
        for dt in range(1, D + 1):
            if t + 1 < dt:
                break
            rr = (t - dt + 1) % D
            if dt == 1:
                for c in range(m):
                    col[c] = ring[rr, c]
            else:
                for c in range(m):
                    col[c] += ring[rr, c]
            if not has[dt]:
                continue
            for k in range(shapes.shape[0]):
                if shapes[k, 0] != dt:
                    continue
                df = shapes[k, 1]
                nb = m - df + 1
                if nb <= 0:
                    continue
                thr = thrs[k]
                for c in range(nb):
                    box[c] = col[c]
                for j in range(1, df):
                    for c in range(nb):
                        box[c] += col[c + j]
                # the largest box sum of the row first (a branch-free loop): in noise
                # almost no row holds a box above the threshold
                mx = box[0]
                for c in range(1, nb):
                    mx = max(mx, box[c])
                if mx <= thr:
                    continue
                for c in range(nb):
                    tot = box[c]
                    if tot > thr:
                        big = np.int64(0)
                        for u in range(t - dt + 1, t + 1):
                            for w in range(c, c + df):
                                if lev0[u, w] == 0 and not det[u, w] and g[u, w] > big:
                                    big = np.int64(g[u, w])
                        if tot - big <= rest[k]:
                            continue
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


@njit(**_opts)
def row_medians(blk, cnt, out):
    """out[c] = median of the cnt[c] smallest values of blk[c] (the valid ones: the
    caller puts +inf at excluded samples); NaN where cnt[c] == 0."""
    m = blk.shape[0]
    for c in range(m):
        k = cnt[c]
        if k == 0:
            out[c] = np.nan
            continue
        a = blk[c]
        h = k // 2
        hi = _select(a, h)
        if k % 2:
            out[c] = hi
        else:
            lo = a[0]
            for i in range(1, h):
                if a[i] > lo:
                    lo = a[i]
            out[c] = 0.5 * (lo + hi)


@njit(**_opts)
def group_means(x, ex, off, g, gm, gbad):
    """gm[j, c] = mean of x over the rows of group j (rows j g - off .. j g - off +
    g - 1 within the plane) not excluded, less the largest of them when there are two
    or more; gbad[j, c] = no such row."""
    n, m = x.shape
    ng = gm.shape[0]
    cnt = np.zeros(m, np.int64)
    big = np.empty(m, np.float32)
    for j in range(ng):
        a = max(0, j * g - off)
        b = min(n, (j + 1) * g - off)
        for c in range(m):
            gm[j, c] = 0.0
            cnt[c] = 0
            big[c] = -np.inf
        for t in range(a, b):
            for c in range(m):
                if not ex[t, c]:
                    v = x[t, c]
                    gm[j, c] += v
                    cnt[c] += 1
                    big[c] = max(big[c], v)
        for c in range(m):
            k = cnt[c]
            if k > 1:
                gm[j, c] = (gm[j, c] - big[c]) / (k - 1)
                gbad[j, c] = False
            elif k == 1:
                gbad[j, c] = False
            else:
                gbad[j, c] = True


@njit(**_opts)
def masked_row_medians(a, ok, out):
    """out[j] = median of a[j, c] over the c with ok[j, c] (NaN when none)."""
    g, m = a.shape
    buf = np.empty(m)
    for j in range(g):
        k = 0
        for c in range(m):
            if ok[j, c]:
                buf[k] = a[j, c]
                k += 1
        out[j] = median_inplace(buf[:k]) if k > 0 else np.nan


@njit(**_opts)
def edge_test(g, lev0, det, done, thr, out):
    """out[t, c] = True for free samples (lev0 == 0, not done) with g[t, c] > thr next
    to a detected sample (det) in the same dump (c - 1, c + 1) or channel (t - 1,
    t + 1).  Returns the number marked."""
    n, m = g.shape
    hits = 0
    for t in range(n):
        for c in range(m):
            if lev0[t, c] != 0 or done[t, c] or g[t, c] <= thr:
                continue
            near = ((c > 0 and det[t, c - 1]) or (c + 1 < m and det[t, c + 1])
                    or (t > 0 and det[t - 1, c]) or (t + 1 < n and det[t + 1, c]))
            if near:
                out[t, c] = True
                hits += 1
    return hits


@njit(**_opts)
def run_end_scores(x, ex, bp, rowblock, inv_sigma, crow, bcol, bpart, pin, pout, score):
    """Adds one product's log-likelihood ratios of the dumps of each boundary part to
    ``score`` (nb, S): for boundary i (channel bcol[i], boundary part bpart[i], the
    run's part inside it pin[i] and the unflagged part outside pout[i]), with
    r_t = (x[t, c] / bp[rowblock[t], c] - 1) / sigma and the inside and outside
    means mu_in, mu_out of r over the samples not excluded, score[i, j] +=
    (mu_in - mu_out) (r_t - (mu_in + mu_out) / 2) for the j-th dump of the boundary
    part counted from the inside (0 for an excluded sample)."""
    for i in range(bcol.shape[0]):
        c = bcol[i]
        mus = np.zeros(2)
        for side in range(2):
            q = pin[i] if side == 0 else pout[i]
            s = 0.0
            k = 0
            for t in range(crow[q], crow[q + 1]):
                if not ex[t, c]:
                    s += (x[t, c] / bp[rowblock[t], c] - 1.0) * inv_sigma
                    k += 1
            mus[side] = s / k if k > 0 else np.nan
        d = mus[0] - mus[1]
        if not (d == d):
            continue
        mid = 0.5 * (mus[0] + mus[1])
        a, b = crow[bpart[i]], crow[bpart[i] + 1]
        inward_first = pin[i] < bpart[i]          # the run lies before the boundary part
        for j in range(b - a):
            t = a + j if inward_first else b - 1 - j
            if not ex[t, c]:
                r = (x[t, c] / bp[rowblock[t], c] - 1.0) * inv_sigma
                score[i, j] += d * (r - mid)


@njit(**_opts)
def clear_run_ends(rows, crow, bcol, bpart, pin, keep):
    """rows[t, bcol[i]] = False for the dumps of boundary part bpart[i] beyond the
    first keep[i] counted from the run's inside (pin[i] before or after it)."""
    for i in range(bcol.shape[0]):
        a, z = crow[bpart[i]], crow[bpart[i] + 1]
        if keep[i] >= z - a:
            continue
        c = bcol[i]
        if pin[i] < bpart[i]:
            for t in range(a + keep[i], z):
                rows[t, c] = False
        else:
            for t in range(a, z - keep[i]):
                rows[t, c] = False

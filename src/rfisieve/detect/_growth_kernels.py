"""Compiled (numba) inner loops of the bounded-reach SIR operator.

Work on C-contiguous 2-D bool planes ``(time, channel)``.  Compiled with
``nogil=True`` (dask threads run in parallel) and ``cache=True``.  The public,
documented entry points are :func:`rfisieve.detect.growth.sir_operator` and
:func:`rfisieve.detect.growth.sir_grow`; the functions here check nothing and
overwrite their output arguments.

* :func:`sir_rows_reach`: one direction along axis 1 (the contiguous axis) with
  monotonic deques, every sample decided; :func:`rfisieve.detect.growth.sir_operator`
  transposes for the time axis.
* :func:`sir_grow_reach`: both directions of :func:`rfisieve.detect.growth.sir_grow`
  in one sweep down the dumps, OR-ed into the output, without transposes.  Only
  *candidates* need deciding (dumps with many decide every channel, vectorised):
  clean samples with at least ``k`` flagged samples
  within the reach (a running count per channel along time, a prefix count per
  dump along frequency).  A flagged sample is always in the output, and
  :func:`rfisieve.detect.growth._skip_threshold` gives the least ``k`` for which no
  clean sample with fewer flagged neighbours can be added.  A candidate is
  decided from the same prefix values W(k) = C(k) - (1 - eta) k as in
  :func:`sir_rows_reach` (C(k) the number of flagged samples before k in the
  whole line, kept as an exact integer), so each decision is bit-identical.
"""

import numpy as np
from rfisieve.detect._jit import njit

_opts = dict(nogil=True, cache=True)


@njit(**_opts)
def sir_rows_reach(mask, eta, reach, out):
    """Bounded-reach SIR operator along axis 1 of a bool plane, into ``out``.

    With C(k) the number of flagged samples before k and
    W(k) = C(k) - (1 - eta) k (computed directly, not accumulated, so its
    rounding does not grow along the line), sample y is flagged iff

        max_{y < Y2 <= min(m, y + 1 + R)} W(Y2) - min_{max(0, y - R) <= Y1 <= y} W(Y1) >= -1e-9

    Both extrema are sliding windows that move right by one as y does; each is
    kept in a monotonic deque of indices (stored in an int64 array with head and
    tail pointers), so a line costs O(m) whatever R is.
    """
    n, m = mask.shape
    W = np.empty(m + 1)
    dq_max = np.empty(m + 1, np.int64)
    dq_min = np.empty(m + 1, np.int64)
    q = 1.0 - eta
    tol = 1e-9
    for t in range(n):
        c = 0
        W[0] = 0.0
        for i in range(m):
            if mask[t, i]:
                c += 1
            W[i + 1] = c - q * (i + 1)
        # max deque over Y2 in (y, y + 1 + R]: values decreasing from head
        hmax = 0
        tmax = 0
        nxt = 1            # next Y2 index to enter the max window
        # min deque over Y1 in [y - R, y]: values increasing from head
        hmin = 0
        tmin = 0
        for y in range(m):
            hi = y + 1 + reach
            if hi > m:
                hi = m
            while nxt <= hi:
                v = W[nxt]
                while tmax > hmax and W[dq_max[tmax - 1]] <= v:
                    tmax -= 1
                dq_max[tmax] = nxt
                tmax += 1
                nxt += 1
            while dq_max[hmax] < y + 1:
                hmax += 1
            v = W[y]
            while tmin > hmin and W[dq_min[tmin - 1]] >= v:
                tmin -= 1
            dq_min[tmin] = y
            tmin += 1
            while dq_min[hmin] < y - reach:
                hmin += 1
            out[t, y] = W[dq_max[hmax]] - W[dq_min[hmin]] >= -tol


@njit(**_opts)
def _max_into(acc, row, m):
    """acc[c] = max(acc[c], row[c]) for c < m (row a 1-D view: vectorises)."""
    for c in range(m):
        v = row[c]
        acc[c] = v if v > acc[c] else acc[c]


@njit(**_opts)
def _min_into(acc, row, m):
    """acc[c] = min(acc[c], row[c]) for c < m."""
    for c in range(m):
        v = row[c]
        acc[c] = v if v < acc[c] else acc[c]


@njit(**_opts)
def _interval_hit(hv, lv, col, y, lo, hi, off, msk, tol):
    """One SIR decision from prefix values: max over y < Y2 <= hi of W(Y2) minus
    min over lo <= Y1 <= y of W(Y1) >= -tol, W(Y) = hv[(Y + off) & msk, col] for
    the maxima and lv[...] for the minima; the minimum is searched downwards from
    y and stops as soon as the difference suffices (it only grows as the minimum
    falls)."""
    best2 = hv[(y + 1 + off) & msk, col]
    for y2 in range(y + 2, hi + 1):
        v = hv[(y2 + off) & msk, col]
        if v > best2:
            best2 = v
    lo1 = lv[(y + off) & msk, col]
    if best2 - lo1 >= -tol:
        return True
    for y1 in range(y - 1, lo - 1, -1):
        v = lv[(y1 + off) & msk, col]
        if v < lo1:
            lo1 = v
            if best2 - lo1 >= -tol:
                return True
    return False


@njit(**_opts)
def sir_grow_reach(mask, eta, rt, kt, rf, kf, out):
    """out = mask | T | F for a C-contiguous bool (n, m) plane, in one sweep down
    the dumps.

    T is the bounded-reach SIR operator along time (axis 0) with reach ``rt``
    (rt < 0: T not computed, treated as empty; else 0 <= rt < n < 2**31), F the
    same along frequency (axis 1) with reach ``rf`` (rf < 0: not computed; else
    0 <= rf < m).  ``kt``, ``kf`` (>= 0): a clean sample is decided only when at
    least that many samples are flagged within the reach along the axis
    ([t - rt, t + rt] by dumps, [c - rf, c + rf] by channels); the caller
    guarantees that no clean sample with fewer is added
    (:func:`rfisieve.detect.growth._skip_threshold`).

    A decision is max_{y < Y2 <= min(N, y + 1 + R)} W(Y2)
    - min_{max(0, y - R) <= Y1 <= y} W(Y1) >= -1e-9 over the prefix values
    W(Y) = C(Y) - (1 - eta) Y of the line (N samples, C(Y) flagged before Y, an
    exact integer), computed with the same operands and operations as
    :func:`sir_rows_reach`, so bit-identical to it.  Along time the W of dumps
    t - rt .. t + 1 + rt live in a ring buffer of rows; along frequency W of the
    dump is one row (padded with -inf / +inf beyond its ends for the maxima /
    minima).

    Per dump t, vectorised over channels: the running window count of flagged
    samples (add dump t + rt, remove dump t - rt - 1), the next ring row, and a
    branch-free count of the candidates.  Dumps with few candidates decide them
    one by one (stopping as soon as the interval sums suffice); dumps with many
    decide every channel with the window extrema computed row-wise over the
    ring (2 R + 2 vectorised passes), which bounds the cost on dense masks."""
    n, m = mask.shape
    q = 1.0 - eta
    tol = 1e-9
    do_t = rt >= 0
    do_f = rf >= 0
    one = np.int32(1)
    zero = np.int32(0)
    cnt = np.zeros(m, np.int32)         # flagged in dumps [t - rt, t + rt], per channel
    cum = np.zeros(m, np.int32)         # C(Y) of the next ring row Y, per channel
    S = 1
    while do_t and S < 2 * rt + 2:
        S *= 2
    MS = S - 1
    ring = np.empty((S if do_t else 1, m))
    mx = np.empty(m)
    mn = np.empty(m)
    rf2 = rf if do_f else 0
    ppad = np.zeros(m + 1 + 2 * rf2, np.int64)   # along a dump: flagged in channels < k
    wmax = np.full(m + 1 + 2 * rf2, -np.inf)
    wmin = np.full(m + 1 + 2 * rf2, np.inf)
    wmax2 = wmax.reshape(-1, 1)         # 2-D views for _interval_hit (column 0)
    wmin2 = wmin.reshape(-1, 1)
    if do_t:
        for t in range(rt):
            for c in range(m):
                cnt[c] += one if mask[t, c] else zero
        for y in range(rt + 1):          # rt < n: rows W(0) .. W(rt); then cum = C(rt)
            k = y & MS
            for c in range(m):
                ring[k, c] = cum[c] - q * y
            if y < rt:
                for c in range(m):
                    cum[c] += one if mask[y, c] else zero
    for t in range(n):
        for c in range(m):
            out[t, c] = mask[t, c]
        if do_t:
            ad = t + rt
            su = t - rt - 1
            if ad < n:                   # cum: C(ad) -> C(ad + 1), the ring row W(ad + 1)
                y = ad + 1
                k = y & MS
                qy = q * y
                for c in range(m):
                    a = one if mask[ad, c] else zero
                    cnt[c] += a
                    cum[c] += a
                    ring[k, c] = cum[c] - qy
            if su >= 0:
                for c in range(m):
                    cnt[c] -= one if mask[su, c] else zero
            nc = 0
            for c in range(m):
                nc += 1 if (cnt[c] >= kt) & (not mask[t, c]) else 0
            hi = min(n, t + 1 + rt)
            lo = max(0, t - rt)
            if nc * 8 > m:
                # (row views: shifted indexing in the inner loops defeats vectorisation)
                rw = ring[(t + 1) & MS]
                for c in range(m):
                    mx[c] = rw[c]
                for y2 in range(t + 2, hi + 1):
                    _max_into(mx, ring[y2 & MS], m)
                rw = ring[t & MS]
                for c in range(m):
                    mn[c] = rw[c]
                for y1 in range(lo, t):
                    _min_into(mn, ring[y1 & MS], m)
                for c in range(m):
                    out[t, c] = mask[t, c] | (mx[c] - mn[c] >= -tol)
            elif nc > 0:
                for c in range(m):
                    if cnt[c] >= kt and not mask[t, c]:
                        out[t, c] = _interval_hit(ring, ring, c, t, lo, hi, 0, MS, tol)
        if do_f:
            # ppad[rf + k] = C(k) for 0 <= k <= m, C(0) to the left, C(m) to the right
            s = 0
            for c in range(m):
                s += 1 if mask[t, c] else 0
                ppad[rf + c + 1] = s
            if s >= kf:
                for c in range(rf):
                    ppad[rf + m + 1 + c] = s
                # candidates: clean (and not yet added), >= kf flagged in [c - rf, c + rf]
                phi = ppad[2 * rf + 1:]
                nc = 0
                for c in range(m):
                    nc += 1 if (phi[c] - ppad[c] >= kf) & (not out[t, c]) else 0
                if nc > 0:
                    for c in range(m + 1):
                        w = ppad[rf + c] - q * c
                        wmax[rf + c] = w
                        wmin[rf + c] = w
                if nc * 8 > m:
                    wv = wmax[rf + 1:]
                    for c in range(m):
                        mx[c] = wv[c]
                    wv = wmin[rf:]
                    for c in range(m):
                        mn[c] = wv[c]
                    for j in range(1, rf + 1):
                        _max_into(mx, wmax[rf + 1 + j:], m)
                        _min_into(mn, wmin[rf - j:], m)
                    for c in range(m):
                        out[t, c] = out[t, c] | (mx[c] - mn[c] >= -tol)
                elif nc > 0:
                    for c in range(m):
                        if not out[t, c] and phi[c] - ppad[c] >= kf:
                            hi = min(c + rf + 1, m)
                            lo = max(c - rf, 0)
                            out[t, c] = _interval_hit(wmax2, wmin2, 0, c, lo, hi, rf, -1, tol)


@njit(nogil=True, cache=True, fastmath=False, error_model="numpy", boundscheck=False)
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

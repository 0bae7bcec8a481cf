"""Compiled (numba) inner loops of the spectral-kurtosis flaggers
(:mod:`rfisieve.detect.kurtosis`): per-dump SK with a recorded S2, block SK over
aligned blocks of dumps, and the block-SK histogram.  They check nothing."""

import numpy as np

from rfisieve.detect._jit import njit


@njit(cache=True, nogil=True)
def _flag_dumps_kernel(power, s2, valid, scale, mk, m, lower, upper, out):
    nt, nc = power.shape
    a = (mk + 1.0) / (m - 1.0)
    for t in range(nt):
        for c in range(nc):
            if not valid[t, c]:
                continue
            s1 = np.float64(power[t, c]) * scale
            q = np.float64(s2[t, c])
            if not (s1 > 0.0) or not np.isfinite(q):
                continue
            sk = a * (m * q / (s1 * s1) - 1.0)
            out[t, c] = (sk < lower) or (sk > upper)


@njit(cache=True, nogil=True)
def _flag_blocks_kernel(power, valid, t0, m, step, k, lo, hi, min_valid, refine, out):
    nt, nc = power.shape
    s1 = np.zeros(nc)
    s2 = np.zeros(nc)
    cnt = np.zeros(nc, dtype=np.int64)
    vals = np.empty(m)
    rows = np.empty(m, dtype=np.int64)
    # blocks [b*step, b*step + m) in absolute dump index that overlap [t0, t0 + nt)
    b_first = (t0 - m + 1 + step - 1) // step if t0 - m + 1 > 0 else 0
    if b_first < 0:
        b_first = 0
    b_last = (t0 + nt - 1) // step
    for b in range(b_first, b_last + 1):
        start = b * step - t0
        r0 = max(start, 0)
        r1 = min(start + m, nt)
        if r1 <= r0:
            continue
        s1[:] = 0.0
        s2[:] = 0.0
        cnt[:] = 0
        for r in range(r0, r1):
            for c in range(nc):
                # branch-free (vectorises); adding 0.0 for an invalid sample leaves
                # the sums exactly as skipping it would
                ok = valid[r, c]
                p = np.float64(power[r, c]) if ok else 0.0
                s1[c] += p
                s2[c] += p * p
                cnt[c] += np.int64(ok)
        for c in range(nc):
            mm = cnt[c]
            if mm < min_valid or not (s1[c] > 0.0):
                continue
            sk = (mm * k + 1.0) / (mm - 1.0) * (mm * s2[c] / (s1[c] * s1[c]) - 1.0)
            if sk < lo[mm]:
                for r in range(r0, r1):
                    if valid[r, c]:
                        out[r, c] = True
            elif sk > hi[mm]:
                if not refine:
                    for r in range(r0, r1):
                        if valid[r, c]:
                            out[r, c] = True
                    continue
                # drop the brightest dumps one by one until the rest passes
                n_v = 0
                for r in range(r0, r1):
                    if valid[r, c]:
                        vals[n_v] = power[r, c]
                        rows[n_v] = r
                        n_v += 1
                order = np.argsort(vals[:n_v])
                a1 = s1[c]
                a2 = s2[c]
                cur = n_v
                ok = False
                while cur > min_valid:
                    j = order[cur - 1]
                    a1 -= vals[j]
                    a2 -= vals[j] * vals[j]
                    cur -= 1
                    if a1 <= 0.0:
                        break
                    sk2 = (cur * k + 1.0) / (cur - 1.0) * (cur * a2 / (a1 * a1) - 1.0)
                    if sk2 <= hi[cur]:
                        ok = True
                        break
                if ok:
                    for i in range(cur, n_v):
                        out[rows[order[i]], c] = True
                else:
                    for i in range(n_v):
                        out[rows[i], c] = True


@njit(cache=True, nogil=True)
def _block_histogram_kernel(power, valid, first, nb, m, k, edges, nuni, counts):
    nc = power.shape[1]
    nbins = edges.shape[0] - 1
    e0 = edges[0]
    e1 = edges[nuni]          # the end of the uniform bins; wider bins may follow
    top = edges[nbins] - 1e-9
    s1 = np.zeros(nc)
    s2 = np.zeros(nc)
    ok = np.ones(nc, dtype=np.bool_)
    mf = np.float64(m)
    a = (mf * k + 1.0) / (mf - 1.0)
    for b in range(nb):
        r0 = first + b * m
        s1[:] = 0.0
        s2[:] = 0.0
        ok[:] = True
        for r in range(r0, r0 + m):
            for c in range(nc):
                p = np.float64(power[r, c])
                s1[c] += p
                s2[c] += p * p
                ok[c] &= valid[r, c]
        for c in range(nc):
            if not ok[c]:
                continue
            sk = a * (mf * s2[c] / (s1[c] * s1[c]) - 1.0)
            if not np.isfinite(sk):
                continue
            x = min(max(sk, e0), top)
            if x >= e1:
                # the tail of wider bins: the last edge at or below x
                i = min(np.searchsorted(edges, x, side="right") - 1, nbins - 1)
                counts[i] += 1
                continue
            # bin index exactly as numpy.histogram computes it for uniform edges
            i = int(((x - e0) / (e1 - e0)) * nuni)
            if i == nuni:
                i -= 1
            if x < edges[i]:
                i -= 1
            elif x >= edges[i + 1] and i != nbins - 1:
                i += 1
            counts[i] += 1

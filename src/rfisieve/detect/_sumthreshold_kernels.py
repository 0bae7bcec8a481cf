"""Compiled (numba) inner loops of the SumThreshold detector
(:mod:`rfisieve.detect.sumthreshold`).

Everything here works on C-contiguous 2-D planes ``(time, channel)`` and is
compiled with ``nogil=True`` (so dask threads run in parallel) and ``cache=True``;
the functions check nothing and may overwrite their output arguments.

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
  :func:`_tile_sweep`); both sweeps share :func:`_sweep_passes`; the frequency
  pass takes the time pass's detections as flagged;
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
def _sweep_load(x, lev, rows, K, ring, RM, npass, c1):
    """Load line position K of the one-sweep SumThreshold into the ring buffer: the
    input level of x[rows[K], c], or 2 (detected by pass 1) where free and above
    chi_1 (c1)."""
    m = x.shape[1]
    t = rows[K]
    kr = K & RM
    two = np.uint8(2)
    zero = np.uint8(0)
    for c in range(m):
        a = lev[t, c]
        if npass >= 1:
            a = two if (a == zero and x[t, c] > c1) else a
        ring[kr, c] = a


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
    c1 = thrs[1]
    for q in range(npass + 1):
        for b in range(B):
            s[q, b] = 0
            last[q, b] = -1
    for K in range(L + final_lag):
        if K < L:
            _sweep_load(v, lv, ident_rows, K, ring, RM, npass, c1)
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
    c1 = thrs[1]
    for K in range(L + final_lag):
        if K < L:
            _sweep_load(x, lev0, rows, K, ring, RM, npass, c1)
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
def pair_grid(ga, gb, la, lb, da, db, scale, lo, hi, z, lev):
    """A feed pair's summed residual on the grid: z = rint(clip((ga + gb) * scale, lo,
    hi)) (scale = 1 / sqrt(2): unit noise when ga and gb each have it); lev = 255 where
    either product's level is invalid, 1 where either is flagged on input or both
    detected it (da and db), 0 elsewhere: a sample only one product detected stays free,
    so the pair's sum judges it.  Returns the per-row and per-column counts of invalid
    samples (as :func:`init_levels`)."""
    n, m = z.shape
    rowbad = np.zeros(n, np.int64)
    colbad = np.zeros(m, np.int64)
    for t in range(n):
        nb = 0
        for c in range(m):
            bad = la[t, c] == LEV_INVALID or lb[t, c] == LEV_INVALID
            flg = la[t, c] != LEV_FREE or lb[t, c] != LEV_FREE or (da[t, c] and db[t, c])
            lev[t, c] = np.uint8(LEV_INVALID) if bad else (np.uint8(LEV_INPUT) if flg else np.uint8(LEV_FREE))
            v = (np.float64(ga[t, c]) + np.float64(gb[t, c])) * scale
            v = v if v > lo else lo
            v = v if v < hi else hi
            z[t, c] = np.rint(v)
            nb += 1 if bad else 0
            colbad[c] += 1 if bad else 0
        rowbad[t] = nb
    return rowbad, colbad

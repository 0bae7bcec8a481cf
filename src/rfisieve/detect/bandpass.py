"""A receiver's bandpass, followed exactly, and the two tests built on it: persistent
emission on long baselines of time, and compact time-frequency shapes.

Model of a receiver's clean power (radiometer physics; common practice):
x(t, f) = g(t) b(f) S(t, f) (1 + n), a slow gain g times a bandpass b that is fixed
over minutes (steep anti-aliasing edges, knees, shoulders and all), a slow sky
factor S, and noise n of relative rms 1 / sqrt(N).  The bandpass is taken per block
of ``bandpass_dumps`` dumps as each channel's *lower quantile along time*
(:func:`block_bandpass`): it follows any spectral shape exactly, whatever its edges
and knees, because no smoothing runs along frequency.  The SumThreshold flagger then
fits its smooth surface to x / b, where only g S is left: slow in time and smooth in
frequency, so the surface can use a large frequency scale, and an emitter tens of
channels wide stands out of it instead of being absorbed.

What a time quantile absorbs, an emitter present in most of a block's window,
is found by :func:`persistent_flags`: per block of L dumps the channels' mean power is
compared with a frequency-robust baseline, the running median over channels of the
bandpass (a monotone edge or knee is returned exactly by a centred running median).
A 1-sigma carrier in every dump is a sqrt(L)-sigma excess of the block mean.

Blocks are aligned to absolute dump numbers (block k holds dumps k L .. k L + L - 1),
so a chunk of a scan cut anywhere sees the whole scan's blocks away from its ends
(the halo rule is in :func:`rfisieve.detect.sumthreshold.sumthreshold_halo`).
"""

import math

import numpy as np

from rfisieve.detect import _bandpass_kernels as kernels
from rfisieve.detect.background import MAD_TO_SIGMA  # noqa: F401  (one home: 1 / Phi^-1(3/4))

__all__ = ["block_bandpass", "persistent_flags", "persistence_test", "BlockMeans", "compact_flags",
           "edge_flags", "block_lengths", "COMPACT_SHAPES", "EDGE_SIGMA", "bandpass_reach"]


#: Sub-blocks (dumps) in which a channel found by the persistence test is flagged, and
#: the excess (sigma of the sub-block mean) it must show there: an emitter that
#: switches off within a long block is not flagged while it is off.
SUB_DUMPS = 64
REFINE_SIGMA = 2.5
#: ... and within a sub-block, the parts of PART_DUMPS where it shows PART_SIGMA: an
#: on/off switch costs a quarter sub-block instead of a whole one, while a 0.5-sigma
#: carrier (2 sigma in 16 dumps) keeps about 93 % of its parts.
PART_DUMPS = 16
PART_SIGMA = 1.0
#: A part flagged alone (neither neighbour flagged) must show ISOLATED_PART_SIGMA: noise
#: passes PART_SIGMA in norm.sf(1) = 16 % of the parts (scipy.stats), so the off parts
#: of a sub-block that an emitter fills in part were flagged a whole part at a time;
#: norm.sf(2) = 2.3 %.  An emitter on for a part or more at 1 sigma shows 4 sigma
#: there, and a steady carrier's parts lie in runs.
ISOLATED_PART_SIGMA = 2.0

#: A box must pass also without its largest sample, at COMPACT_REST z sqrt(n - 1): a
#: bright sample that SumThreshold left (a carrier just under chi_1, or its neighbour
#: through the channel response) would otherwise lift wide boxes of clean samples
#: around it, while a pulse spread over the box passes (3 sigma x 3 channels: 4.2
#: sigma without its top sample against 0.6 x 4.5 = 2.7).
COMPACT_REST = 0.6

#: Boxes (dumps, channels) of the compact-shape test: short pulses a few channels wide
#: and a few dumps long (the 1 x 1 box is SumThreshold's M = 1 window already).
COMPACT_SHAPES = ((1, 2), (1, 3), (1, 4), (1, 6), (2, 1), (2, 2), (2, 3), (3, 1), (3, 3))

#: Threshold of :func:`edge_flags`, in noise sigma of one sample: a clean sample next to
#: a detection passes it with probability norm.sf(3) = 1.35e-3 (scipy.stats).
EDGE_SIGMA = 3.0


#: The persistence test's threshold where the baseline is rougher than the noise:
#: z + RIPPLE_FACTOR s_r, s_r = sqrt(s**2 - 1) the roughness beyond the noise (s: the
#: robust scatter of the excesses, in noise sigma).  A ripple left by the running
#: median (a standing wave of a few channels' period) has a robust scatter of 1.05
#: times its amplitude (1.4826 MAD of A sin: 1.4826 x 0.707 A), so 3 s_r clears its
#: peaks three times over, where z s (6 s) asked an emitter to stand 6 ripple
#: amplitudes out: a 7-channel block at 5 sigma per dump on a 3 % ripple was missed.
RIPPLE_FACTOR = 3.0

#: The persistence test's temporal baselines (the scan's reference shape) run in a set of
#: blocks only where the spectral ones are rougher than this, in noise sigma (the robust
#: scatter s of the excess over them, see :func:`persistent_flags`): where the spectral
#: baselines follow the bandpass to within about the noise, the temporal test finds
#: what they find (field scenes, tuning seeds: recall and false alarms within 0.001 of
#: each other with it run everywhere), and run everywhere it cost 5 % of the engine's
#: time on the bench scan (7.3 -> 7.65 s; tests/ and bench/throughput.py's scan).
TEMPORAL_FROM = 1.5


#: Passes of the persistence test's running median over channels: each later one
#: replaces the runs of 3 or more channels standing above the previous one by more than
#: BASELINE_CUT robust sigma by the interpolation of their neighbours (:func:`_baselines`).
BASELINE_PASSES = 3
BASELINE_CUT = 3.0


#: A jump of a bandpass by more than STEP_SIGMA channel sigmas whose level holds (an
#: in-band shoulder) parts the running median (:func:`_steps`).
STEP_SIGMA = 10.0


#: Dumps averaged before the bandpass quantile (aligned to absolute dump numbers).
GROUP_DUMPS = 8

#: The time quantile q of :func:`block_bandpass`: an emitter present in up to 1 - q of
#: a window's dumps leaves it (nearly) unmoved.  A median (q = 1/2) absorbed a
#: satellite pass that filled 60 % of a window; q = 1/4 costs 18 % more variance than
#: the median (p (1 - p) / phi(z_p)**2 = 1.86 against pi / 2, per dump and n).
BANDPASS_QUANTILE = 0.25


def _blocks(t0, n, length):
    """(k, a, b) for the aligned blocks of ``length`` dumps that overlap plane rows
    0 .. n - 1 (a, b: the block's rows within the plane)."""
    out = []
    k = int(t0) // length
    while k * length < t0 + n:
        a, b = max(0, k * length - t0), min(n, (k + 1) * length - t0)
        out.append((k, a, b))
        k += 1
    return out


def bandpass_reach(bandpass_dumps):
    """Dumps by which a row's bandpass (:func:`block_bandpass`) reaches: its block of
    T dumps and half a block on each side, 3 T / 2."""
    return int(math.ceil(1.5 * int(bandpass_dumps)))


def block_bandpass(values, exclude, t0=0, bandpass_dumps=256):
    r"""Bandpass per aligned block of dumps: each channel's lower quantile along time.

    Method: for block k (absolute dumps k T .. k T + T - 1, T = ``bandpass_dumps``)
    and channel f,

    .. math:: b_k(f) = Q_q\{x(t, f) : kT - T/2 \le t < (k+1)T + T/2\}

    the q-quantile (q = ``BANDPASS_QUANTILE`` = 1/4) over samples not excluded (a
    window of 2 T dumps centred on the block, so the quantile has at least T / 2
    dumps also at a scan's ends), taken over the means of aligned groups of
    ``GROUP_DUMPS`` dumps, each without its largest dump (about the noise of the
    quantile of the dumps themselves, at an eighth of the cost; without the largest
    dump, because a pulse train faster than the groups, such as a radar pulsing one
    dump in six, puts a pulse in every group and would lift every group mean, so the
    quantile too).  A lower quantile because an emitter present in
    under 1 - q = 3/4 of the window moves it little (breakdown point q; Hampel
    1974, JASA 69, 383), where a median absorbs any emitter on in over half of the
    window: a satellite pass of 400 dumps fills 60 % of a 512-dump window.  Noise
    and gain scale every channel's quantile alike (the same relative noise, the
    same gain in every channel; radiometer equation), so after the scaling below
    b_k carries the spectral shape only, as the median did.  Its noise is about
    1.36 / sqrt(2 T) of a dump's (asymptotic variance of a sample quantile,
    q (1 - q) / phi(z_q)**2 sigma**2 / n = 1.86 sigma**2 / n; Serfling 1980,
    Approximation Theorems of Mathematical Statistics, 2.3.3).  Channels with
    no sample get the linear interpolation of their neighbours.  Each block's
    bandpass is scaled to a median of 1 over the channels: it carries the spectral
    shape only, and the slow gain (which would otherwise leave a step at every block
    boundary where it drifts) is left to the surface fit.

    Parameters
    ----------
    values : ndarray (ntime, nchan), float32
    exclude : ndarray of bool, same shape
        Samples left out (invalid, flagged upstream, known-bad).
    t0 : int
        Absolute dump number of the first row.
    bandpass_dumps : int
        T, dumps per block.

    Returns
    -------
    bp : ndarray (nblocks, nchan), float32
    rowblock : ndarray (ntime,), int64
        Index into ``bp`` of each row's block.
    """
    x = np.ascontiguousarray(values, dtype=np.float32)
    ex = np.ascontiguousarray(exclude, dtype=np.bool_)
    n, m = x.shape
    T = int(bandpass_dumps)
    blocks = _blocks(t0, n, T)
    bp = np.empty((len(blocks), m), np.float32)
    rowblock = np.empty(n, np.int64)
    half = T // 2
    # means over aligned groups of G dumps first (each without its largest dump): the
    # quantile of n / G group means has about the noise of the quantile of n dumps
    # (both near 1.86 sigma**2 / n), at a G-th of the cost
    G = GROUP_DUMPS if T % (2 * GROUP_DUMPS) == 0 else 1
    off = int(t0) % G
    ng = -(-(n + off) // G)
    gm = np.empty((ng, m), np.float32)
    gbad = np.empty((ng, m), np.bool_)
    kernels.group_means(x, ex, off, G, gm, gbad)
    buf = np.empty((m, min(ng, (2 * T) // G + 1)), np.float32)
    col = np.empty(m, np.float64)
    for i, (k, a, b) in enumerate(blocks):
        wa, wb = max(0, k * T - half - t0), min(n, (k + 1) * T + half - t0)
        ga, gb = (wa + off) // G, -(-(wb + off) // G)
        if buf.shape[1] < gb - ga:
            buf = np.empty((m, gb - ga), np.float32)
        kernels.column_quantiles(gm, gbad, ga, gb, BANDPASS_QUANTILE, col, buf)
        kernels.fill_nan_1d(col)
        # the shape only: each block's bandpass is scaled to a median of 1 over the
        # channels, so a gain that drifts between blocks leaves no step at their
        # boundaries (the surface fit follows the gain, continuously)
        level = np.median(col)
        bp[i] = col / level if level > 0 else col
        rowblock[a:b] = i
    bp[~(bp > 0)] = 1.0
    return bp, rowblock


def reference_shape(values, exclude):
    """One window's bandpass shape for the scan's reference (:func:`reference_of`): each
    channel's lower quantile over the window's dumps, scaled to a median of 1 over the
    channels (:func:`block_bandpass` with the window as its one block).

    Parameters
    ----------
    values : ndarray (ntime, nchan)
    exclude : ndarray of bool, same shape

    Returns
    -------
    ndarray (nchan,), float64
    """
    n = int(np.shape(values)[0])
    if n == 0:
        return np.ones(np.shape(values)[1])
    return block_bandpass(values, exclude, 0, n)[0][0].astype(np.float64)


def reference_of(shapes):
    """The scan's reference bandpass shape: the per-channel median of the windows'
    shapes (:func:`reference_shape`), scaled to a median of 1; None without a window.
    An emitter on in fewer than half of the windows leaves it (a median; Hampel 1974,
    JASA 69, 383), so each block's bandpass over it (:class:`BlockMeans`) is flat but
    for what differs from most windows: every fixed structure of the receiver divides
    out, standing waves included."""
    shapes = [np.asarray(x, dtype=np.float64) for x in shapes if x is not None]
    if not shapes:
        return None
    ref = np.median(np.stack(shapes), axis=0)
    level = np.median(ref)
    ref = ref / level if level > 0 else ref
    ref[~(ref > 0)] = 1.0
    return ref


def block_lengths(persist_dumps, bandpass_dumps):
    """Block lengths L of the persistence test: ``persist_dumps`` and its halves down
    to a quarter of it (at least 16), each dividing ``bandpass_dumps``."""
    L = int(persist_dumps)
    out = []
    for k in range(3):
        ln = L >> k
        if ln >= 16 and int(bandpass_dumps) % ln == 0:
            out.append(ln)
    return tuple(out)


def persistent_flags(values, exclude, detected, bp, rowblock, t0, sigma, lengths, half_width, z,
                     protect=None, bandpass_dumps=256):
    r"""Persistent and intermittent emission: channels whose mean over a block of L
    dumps stands out from the spectral baseline.

    Method: for each block j of L dumps and channel f, the mean m_j(f) of the
    samples neither excluded nor already detected (n_j(f) of them) is divided by the
    baseline B_k(f), the running median over 2 h + 1 channels (h = ``half_width``;
    centred, shrinking at the band's ends) of the bandpass b_k of
    :func:`block_bandpass` for the block k holding j, and by the block's gain
    g_j = median over channels of m_j / B_k.  The excess
    e = m_j / (g_j B_k) - 1 has noise sigma / sqrt(n_j) (sigma: a dump's relative
    noise); a channel is flagged over the block when

    .. math:: e \sqrt{n_j} / \sigma > z + 3 \sqrt{\max(0, s_j^2 - 1)}

    with s_j the robust scatter (1.4826 MAD) over channels of the excess over the
    running median (below) in the same units: where the baseline is rougher than
    the noise (ripple of a few channels' period), the threshold rises by three times
    the roughness beyond the noise (``RIPPLE_FACTOR``; a ripple's peaks lie at about
    one robust scatter).  Only channels with n_j >= L / 4 are tested.  An
    emitter up to about h channels wide stands out of the running median (a median
    ignores under half of its window).  The excess is taken over two baselines and
    the smaller one counts: the running median, which follows a monotone edge, knee
    or shoulder exactly but cuts the tops of curved stretches, and a local quadratic
    in log power over the same window (leaving out the channels that stand out of
    the running median: a robust local regression in the manner of Cleveland 1979,
    JASA 74, 829), which
    follows smooth curvature but not a sharp knee.  Interference must stand out
    of both.  A spectrally smooth sky line is *not* told apart from interference:
    protect its range (``protect``).  Each channel found in a block is flagged in
    the sub-blocks of ``SUB_DUMPS`` where its own excess passes ``REFINE_SIGMA``,
    and there in the parts of ``PART_DUMPS`` where it passes ``PART_SIGMA``
    (``ISOLATED_PART_SIGMA`` for a part whose neighbours are not flagged).

    The blocks are the aligned ones (dumps j L .. j L + L - 1, absolute numbers) and
    those half a block later (j L + L / 2 ..): an emitter on for about L dumps across
    an aligned boundary puts half its dumps in each aligned block, e sqrt(L) / 2 in
    each, and all of them in the shifted one (overlapping windows; common practice).
    A shifted block that spans two bandpass blocks is tested as its two aligned
    halves together (:func:`_straddling`), so every mean still nests in one bandpass
    block (the halo grows by L / 2 for the longest L < T,
    :func:`rfisieve.detect.sumthreshold.sumthreshold_halo`); at L = T, where every
    shifted block spans two, they are left out.  Field
    scenes of switching emitters and TDMA, L band at z = 6, pooled over seeds 11, 21,
    ..., 81 (tuning scenes): recall 0.973 -> 0.976 and 0.919 -> 0.921, false alarms
    unchanged (bench/quality.py --field --seed S).

    Parameters
    ----------
    values : ndarray (ntime, nchan)
        Power x (not divided by the bandpass).
    exclude, detected : ndarray of bool
        Samples left out (invalid, flagged upstream), and detections left out of
        the block means (the flagger passes those more than ``STRONG_SIGMA`` above
        its background: they are flagged already, and an intermittent strong
        emitter's channel is not flagged between its pulses for them).
    bp, rowblock
        From :func:`block_bandpass` with ``bandpass_dumps``.
    t0 : int
        Absolute dump number of the first row.
    sigma : float
        Relative noise of one dump (the flagger's noise sigma).
    lengths : sequence of int
        Block lengths L (each divides ``bandpass_dumps``).
    half_width : int
        h, half-width of the running median, channels.
    z : float
        Threshold in sigma of the block mean.
    protect : ndarray of bool (nchan,), optional
        Channels where the test is off (protected sky lines).

    Returns
    -------
    ndarray of bool (ntime, nchan)
    """
    bm = BlockMeans(values, exclude, detected, bp, rowblock, t0, sigma, half_width, lengths, protect,
                    bandpass_dumps=bandpass_dumps)
    return persistence_test([bm], z, protect)[0]


class BlockMeans:
    """One product's sums over aligned parts of ``PART_DUMPS`` dumps, its bandpass
    baselines and the excesses of :func:`persistent_flags` (memoised per group of parts),
    so that the persistence test of a product and of its feed pair
    (:func:`persistence_test`) share them.  Arguments as for :func:`persistent_flags`."""

    def __init__(self, values, exclude, detected, bp, rowblock, t0, sigma, half_width, lengths, protect=None, *,
                 bandpass_dumps, reference=None):
        self.x = x = np.ascontiguousarray(values, dtype=np.float32)
        self.rowblock = rowblock
        self.ex = np.ascontiguousarray(exclude, dtype=np.bool_)
        self.n, self.m = n, m = x.shape
        self.sigma, self.bp, self.lengths, self.T = sigma, bp, tuple(lengths), int(bandpass_dumps)
        self.usable = bool(sigma > 0) and n > 0 and m >= 16
        self.memo, self.zmemo, self.bounds = {}, {}, {}
        if not self.usable:
            return
        # sums over aligned parts of S dumps of the samples neither excluded nor in
        # ``detected`` (the caller passes the strong detections only: leaving out every
        # detection would bias a partly detected weak channel's mean low, keeping strong
        # ones would let a radar's bright pulses flag its channel between them)
        det = np.ascontiguousarray(detected, dtype=np.bool_)
        self.S = S = min(PART_DUMPS, min(int(L) for L in lengths))
        parts = _blocks(t0, n, S)
        self.P = P = len(parts)
        ssum = np.empty((P, m), np.float64)
        scnt = np.empty((P, m), np.int64)
        for q, (_, a, b) in enumerate(parts):
            kernels.block_sums(x, self.ex, det, a, b, ssum[q], scnt[q])
        self.pidx = np.array([k for k, _, _ in parts], np.int64)       # absolute part numbers
        prow = np.array([a for _, a, _ in parts], np.int64)            # first row of each part
        self.plen = np.array([b - a for _, a, b in parts], np.int64)
        self.free = np.ones(m, np.bool_) if protect is None else ~np.asarray(protect, dtype=np.bool_)
        self.pblock = rowblock[prow]                                   # bandpass block of each part
        # channels without a sample in a bandpass block (known-bad ranges, channels
        # flagged upstream): their bandpass is only their neighbours' interpolation,
        # so the baselines leave them out
        held = np.zeros(bp.shape, np.int64)
        # the first part of each bandpass block (parts run block by block)
        self.bstart = first = np.flatnonzero(np.r_[True, self.pblock[1:] != self.pblock[:-1]])
        held[self.pblock[first]] = np.add.reduceat(scnt, first, axis=0)
        self.bases = _baselines(bp, int(half_width), held == 0)
        # the temporal baseline: the scan's reference shape itself (:func:`reference_of`),
        # in every block (each group's gain is taken over it as over the others).  Every
        # fixed structure of the bandpass (standing waves of a few channels' period,
        # knees, shoulders) divides out, and an emitter that is on in this block but not
        # in most of the reference's windows stands out (:func:`persistence_test`).  A
        # slow change of the bandpass's shape is not followed: it raises the scatter,
        # hence the threshold (as a rough spectral baseline does), it does not flag.
        self.tbases = None
        if reference is not None:
            ref = np.asarray(reference, dtype=np.float64)
            if ref.shape == (m,) and np.all(ref > 0):
                self.tbases = (np.broadcast_to(ref, bp.shape),)
        self.csum = np.zeros((P + 1, m))
        np.cumsum(ssum, axis=0, out=self.csum[1:])
        self.ccnt = np.zeros((P + 1, m), np.int64)
        np.cumsum(scnt, axis=0, out=self.ccnt[1:])
        self.crow = np.r_[0, np.cumsum(self.plen)]
        self.every4 = (np.arange(m) % 4) == 0

    def grouped(self, k, shift=0):
        """Sums, counts, rows and bandpass block per group of k aligned parts, each
        part's group, and whether the group lies within one bandpass block (memoised).
        With ``shift`` (parts) the groups start ``shift`` parts later: part p is in
        group (p + k - shift) // k of absolute part numbers, so groups stay aligned
        to absolute dump numbers."""
        if (k, shift) not in self.memo:
            gid = (self.pidx + (k - shift) % k) // k
            new_group = np.r_[True, gid[1:] != gid[:-1]]
            starts = np.flatnonzero(new_group)
            ends = np.r_[starts[1:], self.P]
            self.bounds[k, shift] = (starts, ends)
            self.memo[k, shift] = (self.csum[ends] - self.csum[starts], self.ccnt[ends] - self.ccnt[starts],
                                   self.crow[ends] - self.crow[starts], self.pblock[starts],
                                   np.cumsum(new_group) - 1, self.pblock[starts] == self.pblock[ends - 1])
        return self.memo[k, shift]

    def excess(self, k, cols=None, shift=0, rows=None, temporal=False):
        """Per group of k parts (started ``shift`` parts late, :meth:`grouped`): (ok, z
        over the smaller excess, z over the running median's) and each part's group
        (see :func:`persistent_flags`; memoised for all channels); with ``cols``, only
        for those channels, the groups' gains then taken over every fourth channel (the
        gain is common to all channels: a quarter of them pins it to well under the
        thresholds' resolution); with ``rows`` (group indices), only for those groups,
        in that order (each group's values are its own: the same as in the whole
        result).  A group that spans two bandpass blocks is not ok (only shifted
        groups can: the blocks nest in the bandpass blocks).  ``temporal``: over the
        scan's reference shape (``tbases``) instead of the spectral baselines."""
        key = (k, shift, bool(temporal))
        if cols is None and key in self.zmemo:
            res = self.zmemo[key]
            return res if rows is None else (res[0][rows], res[1][rows], res[2][rows], res[3])
        gs, gc, nrow, blk, grp, inside = self.grouped(k, shift)
        if rows is not None:
            gs, gc, nrow, blk, inside = gs[rows], gc[rows], nrow[rows], blk[rows], inside[rows]
        ok = self.free[None, :] & (gc >= np.maximum(2, nrow // 4)[:, None]) & inside[:, None]
        enough = ok.sum(axis=1) >= 8
        ok &= enough[:, None]
        if cols is None:
            sel, at, gain_ok = slice(None), slice(None), ok
        else:
            # only the channels the gain is taken over and those asked for
            sel = np.union1d(np.flatnonzero(self.every4), cols)
            at = np.searchsorted(sel, cols)
            gs, gc = gs[:, sel], gc[:, sel]
            gain_ok = ok[:, sel] & self.every4[None, sel]
        zs = []
        with np.errstate(all="ignore"):
            mean = gs / np.maximum(gc, 1)
            for base in (self.tbases if temporal else self.bases):
                ratio = mean / base[:, sel][blk]
                g = _row_medians(ratio, gain_ok)
                g = np.where(np.isfinite(g) & enough, g, 1.0)
                zs.append((ratio[:, at] / g[:, None] - 1.0) * np.sqrt(gc[:, at]) / self.sigma)
        okc = ok if cols is None else ok[:, cols]
        res = (okc, np.minimum(zs[0], zs[1]) if len(zs) > 1 else zs[0], zs[0], grp)
        if cols is None and rows is None:
            self.zmemo[key] = res
        return res

    def fine_z(self, k, cols):
        """Per group of k parts, for channels ``cols`` (at least 3 from the ends):
        the symmetric leave-one-out excess of the mean spectrum, in sigma of that
        mean (its variance 1.5 times a sample's: 1 + 49/98); not ok where a channel
        of the seven has no sample."""
        gs, gc, _, _, grp, _ = self.grouped(k)
        idx = cols[:, None] + np.arange(-3, 4)[None, :]
        c7 = gc[:, idx]
        with np.errstate(all="ignore"):
            lm = np.log(np.maximum(gs[:, idx] / np.maximum(c7, 1), 1e-30))
            s1 = 0.5 * (lm[..., 2] + lm[..., 4])
            s2 = 0.5 * (lm[..., 1] + lm[..., 5])
            s3 = 0.5 * (lm[..., 0] + lm[..., 6])
            e = lm[..., 3] - (6 * s1 + 3 * s2 - 2 * s3) / 7.0
        ok = (c7 > 0).all(axis=2)
        return ok, e * np.sqrt(np.maximum(c7[..., 3], 1) / 1.5) / self.sigma, grp


def _joint(results):
    """Products' (ok, z, ...) tests joined: ok in all of them, z = the sum of the z's
    over sqrt(K) (independent noise of unit variance: unit variance again; common
    practice); one product's result unchanged."""
    if len(results) == 1:
        return results[0]
    ok = np.logical_and.reduce([r[0] for r in results])
    zs = [sum(r[i] for r in results) / math.sqrt(len(results)) for i in range(1, len(results[0]) - 1)]
    return (ok, *zs, results[0][-1])


def persistence_test(products, z, protect=None):
    """The persistence test of :func:`persistent_flags` on one product, or on a feed
    pair's products together (:class:`BlockMeans` each): every z of the test is the
    sum of the products' z's over sqrt(K), and a channel must be usable in all of them.
    For a pair, an emitter in both polarizations at strengths 1 and 0.8 stands out by
    1.27 times one product's excess.  With the scan's reference shape (each
    :class:`BlockMeans` built with ``reference``), the test runs a second time over it as
    the baseline, in the block sets where the spectral baselines are rougher than
    ``TEMPORAL_FROM`` (a standing wave they cannot follow), and a channel is a
    candidate when either run finds it; each run's candidates are refined over its own
    baselines (docs/design.md 4.2a).  Returns each product's flags (the same samples,
    less each one's excluded samples)."""
    b0 = products[0]
    n, m = b0.n, b0.m
    if not all(b.usable for b in products):
        return [np.zeros((n, m), np.bool_) for _ in products]
    P, S = b0.P, b0.S
    per_sub = max(1, SUB_DUMPS // S)
    # the spectral baselines, and (with the scan's reference shape) the temporal ones:
    # each with its own roughness, a channel is a candidate when either finds it, and
    # its parts are then refined over the baselines that found it (over the spectral
    # ones, the parts of a channel on a standing wave's crest would stand out by the
    # crest itself)
    kinds = (False, True) if all(b.tbases is not None for b in products) else (False,)
    cands = np.zeros((len(kinds), P, m), np.bool_)
    for L in b0.lengths:
        k = int(L) // S
        # the aligned blocks, and the blocks half a block later (an emitter on for
        # about L dumps across an aligned boundary would show half its excess in each)
        for shift in (0, k // 2) if k > 1 and k % 2 == 0 else (0,):
            if shift and int(L) >= b0.T:
                # L = T: every shifted block spans two bandpass blocks, left out (a rule of
                # L and T alone: a test of whether any shifted block of the plane lies in
                # one bandpass block would keep the partial ones at a plane's ends, so the
                # result would depend on where the plane starts, i.e. on the chunks)
                continue
            rough = False   # set by the spectral run, which comes first
            for ki, temporal in enumerate(kinds):
                if temporal and not rough:
                    continue   # the spectral baselines follow the bandpass to within the noise
                ok, zs, zm, grp = _joint([b.excess(k, shift=shift, temporal=temporal) for b in products])
                if shift:
                    ok, zs, zm = _straddling(b0, products, k, shift, ok, zs, zm, temporal)
                with np.errstate(all="ignore"):
                    med = _row_medians(zm, ok)
                    sc = MAD_TO_SIGMA * _row_medians(np.abs(zm - med[:, None]), ok)
                thr = np.where(np.isfinite(sc), z + RIPPLE_FACTOR * np.sqrt(np.maximum(0.0, sc * sc - 1.0)),
                               np.inf)
                hit = ok & (zs > thr[:, None])
                cands[ki] |= hit[grp]
                rough = rough or bool(np.any(sc > TEMPORAL_FROM))
    cand = cands.any(axis=0)
    flags = np.zeros((P, m), np.bool_)
    strong = np.zeros((P, m), np.bool_)   # parts that would pass ISOLATED_PART_SIGMA too
    # narrow emitters on steep slopes: the bandpass block's fine test, placed in time
    # by the symmetric leave-one-out excess of the sub-block and part means
    nb = b0.bp.shape[0]
    fine = np.zeros((nb, m), np.bool_)
    # a channel that is a candidate in at least half of a bandpass block's parts holds an
    # emitter there: the fine test takes it as a found neighbour from the start
    # (fine_excess's ``held``)
    held = np.zeros((nb, m), np.bool_)
    if cand.any():
        first = b0.bstart
        per_block = np.add.reduceat(cand.astype(np.int32), first, axis=0)
        nparts = np.diff(np.r_[first, b0.P])
        held[b0.pblock[first]] = (2 * per_block >= nparts[:, None]) & (per_block > 0)
    for i in range(nb):
        fine[i] = fine_excess(np.array([b.bp[i] for b in products]) if len(products) > 1 else b0.bp[i],
                              z, protect, held=held[i])
    fcols = np.flatnonzero(fine.any(axis=0))
    fhit = None
    if fcols.size:
        fs_ok, fs_z, fs_g = _joint([b.fine_z(per_sub, fcols) for b in products])
        fp_ok, fp_z, _ = _joint([b.fine_z(1, fcols) for b in products])
        fhit = fine[b0.pblock][:, fcols] & (fs_ok & (fs_z > REFINE_SIGMA))[fs_g] & fp_ok & (fp_z > PART_SIGMA)
    # the channels of a candidate, and those of a fine test's hit: a part found alone by
    # either test is kept when its own excess (part mean over the baselines) passes
    # ISOLATED_PART_SIGMA, whichever test found the channel elsewhere in the plane (a
    # rule that looked at the part's excess only in channels with a candidate somewhere
    # in the plane made a fine hit's fate depend on the plane's extent, i.e. on the
    # chunks)
    cols = np.union1d(np.flatnonzero(cand.any(axis=0)), fcols)
    if cols.size:
        # in the sub-blocks where the channel stands out by REFINE_SIGMA, and there in
        # the parts where it stands out by PART_SIGMA; the excesses are taken only for
        # the parts that can be flagged (a candidate, or a fine test's hit: a part's
        # strength counts only where it is flagged) and their sub-blocks
        can = cand[:, cols].any(axis=1)
        if fhit is not None:
            can |= fhit.any(axis=1)
        pr = np.flatnonzero(can)
        gsub = b0.grouped(per_sub)[4][pr]
        srows = np.unique(gsub)
        at = np.ix_(pr, cols)
        for ki, temporal in enumerate(kinds):
            if temporal and not cands[ki].any():
                continue
            okp, zp, _, _ = _joint([b.excess(1, cols, rows=pr, temporal=temporal) for b in products])
            oks, zsub, _, _ = _joint([b.excess(per_sub, cols, rows=srows, temporal=temporal) for b in products])
            sub_ok = (oks & (zsub > REFINE_SIGMA))[np.searchsorted(srows, gsub)]
            mine = cands[ki] if temporal or len(kinds) == 1 else cands[ki] & ~cands[1]
            flags[at] |= mine[at] & sub_ok & okp & (zp > PART_SIGMA)
            if not temporal:
                strong[at] = zp > ISOLATED_PART_SIGMA
            else:   # the temporal strength counts in the channels the temporal test found
                strong[at] |= (zp > ISOLATED_PART_SIGMA) & cands[ki][:, cols].any(axis=0)[None, :]
    if fhit is not None:
        flags[:, fcols] |= fhit
        strong[:, fcols] |= fhit & (fp_z > ISOLATED_PART_SIGMA)
    # a part flagged alone must pass ISOLATED_PART_SIGMA
    alone = flags.copy()
    alone[1:] &= ~flags[:-1]
    alone[:-1] &= ~flags[1:]
    flags &= ~alone | strong
    outs = []
    prow_of = np.repeat(np.arange(P), b0.plen) if flags.any() else None
    rows = np.zeros((n, m), np.bool_)
    if prow_of is not None:
        rows[:] = flags[prow_of]
        _trim_run_ends(products, flags, rows)
    for b in products:
        outs.append(rows & ~b.ex)
    return outs


def _straddling(b0, products, k, shift, ok, zs, zm, temporal=False):
    """The shifted blocks of k parts that span two bandpass blocks, tested as their two
    aligned halves together: z = (z_1 + z_2) / sqrt(2), each half's excess over its own
    bandpass block's baselines and gain (equal halves of independent noise: unit
    variance again; common practice), usable when both halves are.  So every mean
    still nests in one bandpass block (a dump now depends on the next bandpass
    block's window up to L / 2 away: the halo grows by that), and an emitter
    that switches on shortly before a bandpass-block boundary is tested over the
    block across it (field scenes, tuning seeds: a 1.1-sigma switching emitter that
    came on 35 dumps before a boundary lost those dumps).  Returns (ok, zs, zm) with
    those rows replaced."""
    inside = b0.grouped(k, shift)[5]
    if inside.all():
        return ok, zs, zm
    hgrp = b0.grouped(k // 2)[4]
    starts, ends = b0.bounds[k, shift]
    rows = np.flatnonzero(~inside)
    h1, h2 = hgrp[starts[rows]], hgrp[ends[rows] - 1]
    two = h2 == h1 + 1                      # a whole group of each half (not at a plane's end)
    rows, h1, h2 = rows[two], h1[two], h2[two]
    need = np.unique(np.r_[h1, h2])        # the halves' excesses, of those groups only
    hok, hzs, hzm, _ = _joint([b.excess(k // 2, rows=need, temporal=temporal) for b in products])
    h1, h2 = np.searchsorted(need, h1), np.searchsorted(need, h2)
    ok, zs, zm = ok.copy(), zs.copy(), zm.copy()
    ok[rows] = hok[h1] & hok[h2]
    zs[rows] = (hzs[h1] + hzs[h2]) / math.sqrt(2.0)
    zm[rows] = (hzm[h1] + hzm[h2]) / math.sqrt(2.0)
    return ok, zs, zm


def _trim_run_ends(products, flags, rows):
    r"""The dumps of a run's end parts where the emitter is on (in place on ``rows``).

    Method: a run of flagged parts (``PART_DUMPS`` dumps) along time ends in a part
    that an emitter switching on or off fills only in part.  Between the run's last
    part inside (level mu_in) and the unflagged part outside (mu_out), the switch is
    placed at the maximum-likelihood change point of a step of known levels in
    Gaussian noise: the dumps of the end part, counted from the inside, are kept up
    to the k that maximises the cumulative sum of the log-likelihood ratios
    (mu_in - mu_out)(r_t - (mu_in + mu_out) / 2) (Page 1954, Biometrika 41, 100;
    Hinkley 1970, Biometrika 57, 1), r_t the dump's excess over its bandpass in its
    own noise sigma, summed over a feed pair's products.  The gain is taken as
    constant over the three parts (it drifts slowly).  Runs one part long, and ends
    at the plane's edges, are kept whole."""
    b0 = products[0]
    P = flags.shape[0]
    if P < 3:
        return
    inside_before = flags[1:-1] & ~flags[2:] & flags[:-2]      # run ends at part p (p = 1 .. P - 2)
    inside_after = flags[1:-1] & ~flags[:-2] & flags[2:]       # run starts at part p
    pr, cr = np.nonzero(inside_before)
    pl, cl = np.nonzero(inside_after)
    bpart = np.concatenate([pr, pl]).astype(np.int64) + 1
    bcol = np.concatenate([cr, cl]).astype(np.int64)
    if bpart.size == 0:
        return
    pin = np.concatenate([pr, pl + 2]).astype(np.int64)
    pout = np.concatenate([pr + 2, pl]).astype(np.int64)
    S = int(b0.plen.max())
    score = np.zeros((bpart.size, S))
    for b in products:
        kernels.run_end_scores(b.x, b.ex, b.bp, b.rowblock, 1.0 / b.sigma, b.crow, bcol, bpart, pin, pout,
                               score)
    cum = np.cumsum(score, axis=1)
    keep = np.where(cum.max(axis=1) > 0, np.argmax(cum, axis=1) + 1, 0).astype(np.int64)
    kernels.clear_run_ends(rows, b0.crow, bcol, bpart, pin, keep)


def _row_medians(a, ok):
    """Median of each row of a over its ok entries (NaN for none)."""
    out = np.empty(a.shape[0])
    kernels.masked_row_medians(np.ascontiguousarray(a, dtype=np.float64), np.ascontiguousarray(ok), out)
    return out


def _running_mean(v, half):
    """Mean of v over the window c - half .. c + half clipped to the ends."""
    n = v.shape[0]
    cs = np.concatenate(([0.0], np.cumsum(v)))
    c = np.arange(n)
    lo, hi = np.maximum(0, c - half), np.minimum(n, c + half + 1)
    return (cs[hi] - cs[lo]) / (hi - lo)


def _baselines(bp, half_width, empty=None):
    """The two frequency-robust baselines of each block's bandpass (see
    :func:`persistent_flags`): the centred running median, and a local quadratic in
    log power fitted with the channels that stand out of the running median (by
    more than 3 robust sigma of that difference over the band) left out.  The
    quadratic is fitted once: near a sharp knee it is poor, and the scatter of its
    residual there would make a second pass reject the clean channels instead.
    Where its mean absolute misfit over the window exceeds the running median's
    (steps, knees) the second baseline is the running median too.

    Emitters held by the bandpass (on in most of its window) lift the running median
    where they crowd its window (a 40-channel and a 30-channel emitter 10 channels
    apart fill 70 of 129 channels; a median ignores only under half of its window).
    So the runs of at least 3 channels standing above the running median by more
    than ``BASELINE_CUT`` robust sigma are replaced by the linear interpolation (in
    log power) of their neighbours and the median is taken again,
    ``BASELINE_PASSES`` times in all (the usual robust iteration; Hampel 1974, JASA
    69, 383).  Replacing rather than leaving them out keeps the window centred, so a
    steep edge is still followed (leaving a carrier on a knee out shifted the median
    by a channel's step); runs, because a single channel (noise at a knee, or a
    carrier, which the fine test finds) replaced at a sharp knee would pull the
    median there off the knee.

    Channels ``empty`` (nblocks, nchan) (no sample in the block) are left out: the
    baselines run over the channels that hold data, and the empty ones get the
    interpolation of their neighbours.  Their bandpass is itself the interpolation
    of the channels at the range's ends, so an emitter held by the bandpass next to a
    known-bad range of 80 channels lifted the whole range with it, and with it the
    median of the emitter's channels (field scene, P band: a 1.4-sigma switching
    emitter beside the 390-395 MHz range was missed in a bandpass block).

    The running medians are parted at steps of the bandpass (:func:`_steps`: an
    in-band shoulder) and run on each side, shrinking towards the step as at the
    band's ends.  A window reaching across a step returns a value from its own side
    far from the channel: on a slope beside a 30 % shoulder, up to 1 % off, many
    sigma of a block mean where the radiometer noise is small (clean field scenes at
    N = 2048, 4096, 8192 lost 0.78, 2.2 and 3.6 % of their samples to it; 0.08 %
    now), and at N = 512 still a fifth of a dump's sigma (extended field scenes,
    tuning seeds: false alarms 0.173 -> 0.159 %)."""
    med = np.full(bp.shape, np.nan)
    quad = np.full(bp.shape, np.nan)
    for i in range(bp.shape[0]):
        keep = np.ones(bp.shape[1], np.bool_) if empty is None else ~empty[i]
        if keep.sum() < 16:
            keep[:] = True
        med[i, keep], quad[i, keep] = _baseline_row(bp[i][keep].astype(np.float64), half_width)
        if not keep.all():
            for out in (med[i], quad[i]):
                lg = np.log(out)
                kernels.fill_nan_1d(lg)
                out[:] = np.exp(lg)
    return med, quad


def _baseline_row(row, half_width):
    """:func:`_baselines` of one bandpass row (the channels that hold data only):
    returns (running median, the second baseline)."""
    med = np.empty(row.shape[0])
    lb = np.log(np.maximum(row, 1e-30))
    cuts = _steps(lb, int(half_width))
    _segmented_median(row, half_width, cuts, med)
    up = np.zeros(row.shape, np.bool_)
    sc0 = None
    for _ in range(BASELINE_PASSES - 1):
        d = lb - np.log(np.maximum(med, 1e-30))
        if sc0 is None:
            # over the channels the median does not return exactly (on a monotone
            # run it returns the centre value itself, and those zeros would shrink
            # the scatter to nothing)
            nz = d[d != 0]
            if nz.size < 8:
                break
            sc0 = MAD_TO_SIGMA * np.median(np.abs(nz - np.median(nz)))
        now = up | _runs(d > BASELINE_CUT * sc0, 3)
        if not sc0 > 0 or np.array_equal(now, up):
            break
        up = now
        filled = np.where(up, np.nan, lb)
        kernels.fill_nan_1d(filled)
        _segmented_median(np.exp(filled), half_width, cuts, med)
    lm = np.log(np.maximum(med, 1e-30))
    d = lb - lm
    sc = MAD_TO_SIGMA * np.median(np.abs(d - np.median(d)))
    w = (np.abs(d) <= 3.0 * sc).astype(np.float64) if sc > 0 else np.ones_like(d)
    fit = np.empty_like(lb)
    kernels.local_quadratic(lb, w, half_width, lm, fit)
    # where the quadratic follows the band worse than the running median (steps,
    # sharp knees: the mean absolute misfit over the window is larger),
    # the running median alone counts
    s_med = _running_mean(np.abs(d), half_width)
    s_quad = _running_mean(np.abs(lb - fit), half_width)
    return med, np.where(s_quad < s_med, np.exp(fit), med)


def _segmented_median(v, half_width, cuts, out):
    """The running median of ``kernels.running_median`` (centred, shrinking at the
    ends) run on each segment of v between the cuts (a cut at c parts c and c + 1)."""
    edges = [0] + [int(c) + 1 for c in cuts] + [v.shape[0]]
    for a, b in zip(edges[:-1], edges[1:]):
        if b > a:
            kernels.running_median(np.ascontiguousarray(v[a:b]), int(half_width), out[a:b])


def _steps(lb, h):
    """Steps of a log bandpass lb (an in-band shoulder): the cuts c (between c and
    c + 1) where lb jumps by more than ``STEP_SIGMA`` times the channel noise (the
    median of the 4 channels after c less the median of the 4 up to c; one cut per
    run of such channels, at its largest jump), at least h channels from either
    end, with no jump of the other sign and at least half the size (of any
    significance) within 2 h channels: an emitter held by the bandpass rises and
    falls again within its width (up to about 2 h channels), a step of the bandpass
    does not.  Emitters beside a step lose some of their window: the medians shrink
    towards the cut (extended field scene, seed 601, both polarizations at strength 1:
    satellites 0.989 -> 0.982, switching emitters 0.977 -> 0.969 at INR >= 1; its
    false alarms 0.169 -> 0.158 %)."""
    m = lb.shape[0]
    if m < 2 * h + 8:
        return []
    dif = np.diff(lb)
    noise = MAD_TO_SIGMA * np.median(np.abs(dif - np.median(dif))) / math.sqrt(2.0)
    if not noise > 0:
        return []
    c = np.arange(3, m - 4)
    srt = np.sort(np.lib.stride_tricks.sliding_window_view(lb, 4), axis=1)   # lb[i:i + 4] sorted
    med4 = 0.5 * (srt[:, 1] + srt[:, 2])
    jump = med4[c + 1] - med4[c - 3]
    cand = np.flatnonzero(np.abs(jump) > STEP_SIGMA * noise)
    if cand.size == 0:
        return []
    cuts = []
    for run in np.split(cand, np.flatnonzero(np.diff(cand) > 1) + 1):
        k = run[np.argmax(np.abs(jump[run]))]     # the run's largest jump
        cc, j = int(c[k]), float(jump[k])
        if cc + 1 < h or m - cc - 1 < h:
            continue
        near = jump[max(0, k - 2 * h):k + 2 * h + 1] * np.sign(j)
        if -near.min() < 0.5 * abs(j):            # no jump back within 2 h channels
            cuts.append(cc)
    return cuts


def _runs(mask, k):
    """The True entries of ``mask`` that lie in runs of at least ``k`` (k odd)."""
    core = np.convolve(mask.astype(np.int64), np.ones(k, np.int64), mode="same") == k
    h = k // 2
    out = core.copy()
    for j in range(1, h + 1):
        out[j:] |= core[:-j]
        out[:-j] |= core[j:]
    return out & mask


def _loo_quadratic(lb, nb=None):
    """lb(c) less its prediction (6 s_1 + 3 s_2 - 2 s_3) / 7 from the pairs' means
    s_j = (lb(c - j) + lb(c + j)) / 2 (see :func:`fine_excess`); 0 on the three
    outer channels at each end."""
    m = lb.shape[-1]
    e = np.zeros(lb.shape)
    if m < 7:
        return e
    nb = lb if nb is None else nb
    c = np.arange(3, m - 3)
    s1 = 0.5 * (nb[..., c - 1] + nb[..., c + 1])
    s2 = 0.5 * (nb[..., c - 2] + nb[..., c + 2])
    s3 = 0.5 * (nb[..., c - 3] + nb[..., c + 3])
    e[..., c] = lb[..., c] - (6 * s1 + 3 * s2 - 2 * s3) / 7.0
    return e


def _kink_weights():
    """Weights w[i, j] of the leave-one-out predictions of :func:`_loo_excess`: the
    value at offset 0 of the least-squares fit of a + b j + q j**2 + d max(0, j - j0)
    (a quadratic with a kink at j0) to the six channels j = -3 .. 3, j != 0, for
    j0 = -1, 0, 1 (rows)."""
    J = np.array([-3, -2, -1, 1, 2, 3], np.float64)
    out = []
    for j0 in (-1, 0, 1):
        A = np.stack([np.ones(6), J, J * J, np.maximum(0.0, J - j0)], axis=1)
        out.append(np.array([1.0, 0.0, 0.0, max(0.0, -j0)]) @ np.linalg.pinv(A))
    return np.array(out)


#: (3, 6) weights of the kinked quadratics, neighbours at offsets -3 .. 3 without 0.
KINK_WEIGHTS = _kink_weights()
KINK_OFFSETS = (-3, -2, -1, 1, 2, 3)


def _loo_excess(lb, nb=None):
    """lb's excess over leave-one-out predictions: the smaller of the excess over
    the symmetric quadratic of :func:`_loo_quadratic` and a knee's excess, the larger
    of two: over the straight lines through the three channels on either side,
    (4 l(c -+ 1) + l(c -+ 2) - 2 l(c -+ 3)) / 3 (least squares through j = 1, 2, 3,
    at j = 0), the larger of the two sides; and over quadratics with a kink (a slope
    change) at the channel or at either neighbour, fitted by least squares to the
    three channels on either side (``KINK_WEIGHTS``), the smallest of the three.  A
    sharp knee (a kink of the log bandpass, at a channel or between two) lies on
    both kinds of fit, so a knee is not taken for a carrier; a carrier stands out of
    the symmetric prediction and of the knee's.  The lines alone missed a knee
    rounded over a channel (a softened ramp log(1 + exp(u)) falling 50x over 20
    channels) by up to 1.2 sigma of a dump and hid a 1-sigma carrier on it; the
    kinked quadratics follow it within 0.4 sigma, and the lines the channels next to
    a sharp knee, where a quadratic kinked at the wrong channel misses (computed
    from the definitions; docs/design.md 4.2a).  Returns (min excess, symmetric
    excess); 0 on the three outer channels at each end."""
    m = lb.shape[0]
    nb = lb if nb is None else nb
    sym = _loo_quadratic(lb, nb)
    if m < 7:
        return sym, sym
    c = np.arange(3, m - 3)
    left = lb[c] - (4 * nb[c - 1] + nb[c - 2] - 2 * nb[c - 3]) / 3.0
    right = lb[c] - (4 * nb[c + 1] + nb[c + 2] - 2 * nb[c + 3]) / 3.0
    near = np.stack([nb[c + j] for j in KINK_OFFSETS])          # (6, m - 6)
    kinked = (lb[c] - KINK_WEIGHTS @ near).min(axis=0)
    e = np.zeros(m)
    e[c] = np.minimum(sym[c], np.maximum(np.maximum(left, right), kinked))
    return e, sym


def fine_excess(bp_row, z, protect=None, held=None):
    r"""Channels of one block's bandpass that stand out of a local quadratic in log
    power: narrow persistent emitters on steep slopes and knees.

    Method: a centred running median returns the centre value itself on a steep
    monotone slope, so a narrow carrier there hides in it.  Instead each channel's log
    bandpass l(c) is predicted from its neighbours by the least-squares quadratic
    through the pairs' means s_j = (l(c - j) + l(c + j)) / 2, j = 1, 2, 3 (exact for
    cubics; the channel itself left out): p(c) = (6 s_1 + 3 s_2 - 2 s_3) / 7, and
    by the straight lines through the three channels on either side and by
    quadratics with a kink at the channel or a neighbour (:func:`_loo_excess`: a
    sharp knee lies on both, a rounded one on the latter).  It
    is divided by the robust scatter over the band of the symmetric excess (1.4826
    MAD: the bandpass quartile's noise, about 1.36 / sqrt(2 T) of a dump's, times
    sqrt(3/2) for the prediction); channels above ``z`` are flagged.  The three
    outer channels at each end are not tested.  In the sub-blocks (which only place
    the found channel in time) the symmetric excess of the sub-block means counts,
    scaled by sqrt(n / 1.5) / sigma (1.5: its variance over a sample's, 1 + 49/98).

    Parameters
    ----------
    bp_row : ndarray (nchan,)
        One block's bandpass (:func:`block_bandpass`).
    z : float
        Threshold in robust sigma.
    protect : ndarray of bool, optional
        Channels not tested.
    held : ndarray of bool, optional
        Channels known to hold an emitter in this block (the persistence test's
        candidates): as neighbours they are replaced from the start, like the channels
        found, so that a wide emitter's flat top, which the test does not find, does not
        lift the clean channels up to three away by the predictions' negative outer
        weights (a 25-channel block at INR 25 flagged both channels three beyond its
        edges in every dump of a demo P-band scan): a channel found within three of
        them is kept only when found again with them replaced.

    Returns
    -------
    ndarray of bool (nchan,)
    """
    rows = np.asarray(bp_row, dtype=np.float64)
    if rows.ndim == 2:
        return _fine_excess_joint(rows, z, protect, held)
    lb = np.log(np.maximum(rows, 1e-30))
    m = lb.shape[0]
    hit = np.zeros(m, np.bool_)
    if m < 16:
        return hit
    e, sym = _loo_excess(lb)
    inner = sym[3:m - 3]
    sc = MAD_TO_SIGMA * np.median(np.abs(inner - np.median(inner)))
    if not sc > 0:
        return hit
    # the predictions give the outer neighbours negative weight, so a strong carrier
    # three channels away would lift a clean channel's excess: as neighbours, the
    # channels found are replaced by the linear interpolation of the others, and the
    # test is repeated until the channels found no longer change (at most 4 times)
    return _found_channels([lb], e > z * sc, lambda nbs: _loo_excess(lb, nbs[0])[0] > z * sc, protect, held)


def _found_channels(lbs, found, test, protect, held=None):
    """The channels found by :func:`fine_excess`: ``found`` refined by ``test`` (the
    channels found, given each product's log bandpass with them replaced as
    neighbours) until they no longer change, at most 4 times; the three outer channels
    at each end and the protected ones left out.  With ``held`` channels, a channel
    found within three of them (the predictions' reach), not held itself, is kept only
    when the test finds it again with the held channels replaced as neighbours from the
    start; nothing else changes (inside a held run the neighbours would be the run's
    outer ones, and the emitter's own channels stand out of them).  The second test runs
    only where such a channel was found: rarely."""
    m = lbs[0].shape[0]
    held = None if held is None or not np.any(held) else np.asarray(held, dtype=np.bool_)
    out = _refined(lbs, found, test)
    if held is not None:
        near = (np.convolve(held.astype(np.int64), np.ones(7, np.int64), mode="same") > 0) & ~held
        if (out & near).any():
            out = out & ~(near & ~_refined(lbs, found, test, held))
    hit = np.zeros(m, np.bool_)
    hit[3:m - 3] = out[3:m - 3]
    if protect is not None:
        hit &= ~np.asarray(protect, dtype=np.bool_)
    return hit


def _refined(lbs, found, test, held=None):
    """The iteration of :func:`_found_channels` (``held`` replaced as neighbours at every
    step, the first step taken even when it changes nothing)."""
    first = held is not None
    for _ in range(4):
        if not found.any():
            break
        nbs = []
        for lb in lbs:
            nb = np.where(found if held is None else found | held, np.nan, lb)
            kernels.fill_nan_1d(nb)
            nbs.append(nb)
        now = test(nbs)
        if np.array_equal(now, found) and not first:
            break
        found, first = now, False
    return found


def _fine_excess_joint(rows, z, protect=None, held=None):
    """:func:`fine_excess` on a feed pair's bandpasses (K, nchan) together: each
    product's excess in its own robust sigma, summed over sqrt(K) (unit variance
    again), must pass ``z``; the neighbours found are replaced in every product."""
    lbs = np.log(np.maximum(rows, 1e-30))
    k, m = lbs.shape
    hit = np.zeros(m, np.bool_)
    if m < 16:
        return hit
    scs = []
    first = [_loo_excess(lb) for lb in lbs]     # (e, sym) with every neighbour as measured
    for _, sym in first:
        inner = sym[3:m - 3]
        scs.append(MAD_TO_SIGMA * np.median(np.abs(inner - np.median(inner))))
    if not all(sc > 0 for sc in scs):
        return hit

    def joint(nbs):
        return sum((f[0] if nb is None else _loo_excess(lb, nb)[0]) / sc
                   for lb, nb, sc, f in zip(lbs, nbs, scs, first)) / math.sqrt(k)

    return _found_channels(list(lbs), joint([None] * k) > z, lambda nbs: joint(nbs) > z, protect, held)


def compact_flags(grid, lev0, detected, unit_per_sigma, z, shapes=COMPACT_SHAPES):
    r"""Compact time-frequency shapes: boxes whose normalised sum exceeds z.

    Method: a matched (box) filter for pulses short in time and a few channels wide.
    For a box of dt dumps x df channels of residuals r / sigma (samples already
    detected or not free count 0), its sum over sqrt(dt df) is a unit-variance
    Gaussian in noise; boxes above z are flagged.  A 3-sigma pulse one dump long and
    three channels wide sums to 3 sqrt(3) = 5.2 sigma.  The sums are integer sums on
    SumThreshold's grid (:func:`rfisieve.detect.sumthreshold.to_grid`).

    Parameters
    ----------
    grid : ndarray of int (ntime, nchan)
        Residual on the grid; ``unit_per_sigma`` grid steps are one noise sigma.
    lev0 : ndarray of uint8
        Flagger levels (0 = free).
    detected : ndarray of bool
        Already detected samples.
    z : float
        Threshold of the normalised box sum.
    shapes : sequence of (int, int)
        Box shapes (dt, df).

    Returns
    -------
    ndarray of bool
    """
    out = np.zeros(grid.shape, np.bool_)
    sh = np.array(shapes, dtype=np.int64).reshape(-1, 2)
    thrs = np.array([int(math.floor(z * math.sqrt(dt * df) * unit_per_sigma)) for dt, df in sh], np.int64)
    rest = np.array([int(math.floor(COMPACT_REST * z * math.sqrt(dt * df - 1) * unit_per_sigma))
                     for dt, df in sh], np.int64)
    kernels.box_test(grid, lev0, detected, sh, thrs, rest, out)
    return out


def edge_flags(grid, lev0, detected, unit_per_sigma, z=EDGE_SIGMA, done=None):
    r"""The edges of detected shapes: free samples above z sigma next to a detection.

    Method: a pulse or burst extends past the part that SumThreshold found when its
    last channel or dump fell in no window above threshold (a 3-channel pulse at
    5.5 sigma passes chi_2 = chi_1 / rho = 5.3 as one pair, but its third channel
    alone is far below chi_1 and, with the pair flagged, enters wider windows only
    with its neighbours' threshold values).  A sample beside a detection (same dump,
    channel c -+ 1; same channel, dump t -+ 1) is flagged when its own residual
    r / sigma exceeds z: given the detection next to it, a lower single-sample
    threshold than chi_1 is justified, and a clean neighbour passes with
    probability Phi(-z) (1.35e-3 at z = 3; Gaussian tail, scipy.stats.norm.sf).
    One pass: the edges found are not themselves extended.

    Parameters
    ----------
    grid : ndarray of int (ntime, nchan)
        Residual on SumThreshold's grid (:func:`rfisieve.detect.sumthreshold.to_grid`).
    lev0 : ndarray of uint8
        Flagger levels (0 = free).
    detected : ndarray of bool
        The detections so far.
    unit_per_sigma : float
        Grid steps per noise sigma.
    z : float
        Threshold in sigma of one sample.
    done : ndarray of bool, optional
        Samples not tested (default: ``detected``).  A feed pair's test on its summed
        residual takes as neighbours what either product detected, and tests the
        samples only one of them detected (:func:`rfisieve.detect.sumthreshold.combined_flagger`).

    Returns
    -------
    ndarray of bool
    """
    out = np.zeros(grid.shape, np.bool_)
    detected = np.ascontiguousarray(detected, dtype=np.bool_)
    done = detected if done is None else np.ascontiguousarray(done, dtype=np.bool_)
    kernels.edge_test(grid, lev0, detected, done, int(math.floor(z * unit_per_sigma)), out)
    return out

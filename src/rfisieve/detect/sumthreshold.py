"""The SumThreshold detector (Offringa et al. 2010, MNRAS 405, 155) and the
iterated flagger built on it (background fit, relative residual, robust noise).

Conventions shared by every function here:

* planes are ``(time, channel)``; values are power or amplitude (complex
  visibilities are flagged on their amplitude: the caller passes ``np.abs``);
* ``mask`` marks samples *already flagged*: they take part in every window, at
  the value chi_M of that window;
* ``invalid`` marks samples that are *not there* (NaN, Inf, dropped dumps,
  non-positive power): they are left out of every sum and of the background fit,
  neither counted nor replaced.  A window of M samples is M consecutive valid
  samples of the line (the invalid ones are skipped over), so the values held at
  invalid positions never matter (common practice: zeros or garbage would bias the
  sums);
* only positive excursions are thresholded: RFI adds power, and a negative
  residual comes from noise, background errors next to strong RFI or drop-outs,
  the last of which are caught as invalid samples before this detector;
* the result is the mask of new detections only (never the input mask).
"""


import threading

import numpy as np

from rfisieve.detect import _sumthreshold_kernels as kernels
from rfisieve.detect import _bandpass_kernels as bpk
from rfisieve.detect.background import _buf, cell_size, coarse_reach, coarse_residual, robust_sigma2
from rfisieve.detect.bandpass import (COMPACT_SHAPES, PART_DUMPS, BlockMeans, bandpass_reach, block_bandpass,
                                      block_lengths, compact_flags, edge_flags, persistence_test)

__all__ = ["window_sizes", "sumthreshold", "sumthreshold_1d", "sumthreshold_flagger", "combined_flagger",
           "sumthreshold_noise", "threshold_factors", "sumthreshold_halo", "grid_unit", "to_grid"]


def window_sizes(max_window):
    """Window lengths M = 1, 2, 4, ... up to the largest power of two not above
    ``max_window`` (at least 1)."""
    mw = max(1, int(max_window))
    return tuple(1 << k for k in range(mw.bit_length()))


def _npass(max_window):
    return len(window_sizes(max_window))


def _levels(shape, mask, invalid):
    f = np.zeros(shape, np.bool_) if mask is None else np.ascontiguousarray(mask, dtype=np.bool_)
    b = np.zeros(shape, np.bool_) if invalid is None else np.ascontiguousarray(invalid, dtype=np.bool_)
    if f.shape != tuple(shape) or b.shape != tuple(shape):
        raise ValueError("mask/invalid must have the shape of values %r" % (tuple(shape),))
    lev = np.empty(shape, np.uint8)
    rowbad, colbad = kernels.init_levels(f, b, lev)
    return lev, rowbad, colbad


def grid_unit(max_window):
    """Grid step of SumThreshold's integer sums for windows up to ``max_window``:
    returns (unit, dtype), chi_1 being ``unit`` grid steps.

    Samples are put on the grid x_g = rint(clip(x / chi_1, -M_max, 2) * unit)
    (:func:`to_grid`), thresholds as rint(unit / rho**log2(M)), and all window
    sums are integer sums: exact, so they do not depend on the order of summing,
    and the running sums of the compiled sweeps run in 32-bit lanes.  unit =
    2**16 with int32 for M_max <= 128 (a step of 1.5e-5 chi_1; chi_M rounded to
    better than 1e-4 of itself), else 2**(62 - 2 k) with int64 for M_max =
    2**k, at most 2**42; no sum of M_max samples on the grid can overflow
    (M_max**2 unit <= 2**30, resp. 2**62).  The clip changes no result: a sample
    above 2 chi_1 is flagged at M = 1 either way and enters every larger window
    at chi_M; a sample below -M_max chi_1 keeps every window holding it below
    its threshold either way, the other samples entering at most chi_1 (for
    rho > 1)."""
    k = max(0, int(max_window).bit_length() - 1)
    if k <= 7:
        return 1 << 16, np.int32
    return 1 << (62 - 2 * max(k, 10)), np.int64


def to_grid(values, chi1, max_window, out=None):
    """``values`` (2-D) on SumThreshold's integer grid for threshold ``chi1`` and
    windows up to ``max_window`` (:func:`grid_unit`); returns (grid plane, chi_1
    in grid steps).  Non-finite values go to the lower clip (they are left out
    as invalid).  chi1 = 0 (a plane without noise) keeps thresholds 0 and scales
    the grid by the largest finite |value|."""
    unit, dt = grid_unit(max_window)
    x = np.ascontiguousarray(values, dtype=np.float32)
    if out is None:
        out = np.empty(x.shape, dt)
    chi1 = float(chi1)
    if not chi1 >= 0 or not np.isfinite(chi1):
        raise ValueError("chi1 must be a finite number >= 0, not %r" % (chi1,))
    top = 1
    if chi1 == 0:
        fin = np.abs(x[np.isfinite(x)])
        chi1 = float(fin.max()) if fin.size and fin.max() > 0 else 1.0
        top = 0
    kernels.to_grid(x, *_grid_args(chi1, max_window), out)
    return out, unit * top


def _grid_args(chi1, max_window):
    """(scale, lo, hi) of :func:`rfisieve.detect._sumthreshold_kernels.to_grid` for chi1 > 0."""
    unit = grid_unit(max_window)[0]
    return unit / chi1, -float(window_sizes(max_window)[-1] * unit), 2.0 * unit


def _grid_limits(unit, rho, npass, dtype):
    thrs = np.empty(npass + 1, dtype)
    lims = np.empty(npass + 1, dtype)
    kernels.grid_thresholds(float(unit), float(rho), npass, thrs, lims)
    return thrs, lims


def _st_time(xg, lev0, rowbad, colbad, unit, rho, npass, det, merge):
    """SumThreshold passes along axis 0 (lines = columns) of the grid plane xg
    (:func:`to_grid`, chi_1 = unit) into det."""
    n, m = xg.shape
    rows = np.flatnonzero(rowbad < m).astype(np.int64)        # dumps not wholly invalid
    partial = (colbad - (n - rows.shape[0])) > 0              # invalid samples among them
    thrs, lims = _grid_limits(unit, rho, npass, xg.dtype)
    kernels.st_time_pipe(xg, lev0, rows, partial, thrs, lims, npass, det, merge)


def _st_freq(xg, lev0, rowbad, colbad, unit, rho, npass, det, merge):
    """SumThreshold passes along axis 1 (lines = rows) of the grid plane xg into det."""
    n, m = xg.shape
    cols = np.flatnonzero(colbad < n).astype(np.int64)        # channels not wholly invalid
    partial = (rowbad - (m - cols.shape[0])) > 0
    thrs, lims = _grid_limits(unit, rho, npass, xg.dtype)
    kernels.st_freq(xg, lev0, cols, partial, thrs, lims, npass, det, merge,
                    kernels.tile_width(cols.shape[0]))


def sumthreshold(values, mask=None, chi1=6.0, rho=1.5, max_window=32, axis=0, invalid=None):
    r"""SumThreshold operator along one axis of a plane.

    Method (Offringa et al. 2010, MNRAS 405, 155, sect. 3): for window lengths
    M = 1, 2, 4, ..., ``max_window`` in turn, every run of M consecutive samples
    of a line whose mean exceeds

    .. math:: \chi_M = \chi_1 / \rho^{\log_2 M}

    is flagged (all M samples).  In the pass for M, samples flagged before it
    (by the input ``mask`` or by a smaller window) enter the sum at the value
    chi_M instead of their own; detections of the pass itself count only from the
    next pass on, so the result does not depend on the scan direction.  Invalid
    samples are left out: windows run over the valid samples of the line.

    Sums are exact: samples and thresholds are first put on an integer grid of
    chi_1 / 65536 for windows up to 128 (:func:`grid_unit`, :func:`to_grid`), so
    a window mean within about 1e-5 chi_1 of its threshold may be decided as on
    the rounded values, not as in exact arithmetic.  That is far below the
    uncertainty of chi_1 itself (a noise estimate's sampling error is about
    0.3 %); in exchange no sum depends on its order, and the compiled sweeps
    run eight 32-bit lanes per instruction instead of four.

    Parameters
    ----------
    values : array_like, shape (n,) or (n0, n1)
        Residuals x, already in the unit of chi_1 (e.g. divided by the noise sigma).
    mask : array_like of bool, optional
        Already flagged samples (enter at chi_M).
    chi1 : float
        chi_1, the threshold for single samples.
    rho : float
        rho, the ratio of successive thresholds (1.5 in the paper).
    max_window : int
        Largest M (powers of two up to it are used).
    axis : int
        Axis along which windows run (0 = time for a (time, channel) plane).
    invalid : array_like of bool, optional
        Samples left out entirely.

    Returns
    -------
    numpy.ndarray of bool
        New detections (not including ``mask``), shape of ``values``.
    """
    x = np.asarray(values)
    one = x.ndim == 1
    if one:
        x = x[:, None]
        mask = None if mask is None else np.asarray(mask)[:, None]
        invalid = None if invalid is None else np.asarray(invalid)[:, None]
        axis = 0
    if x.ndim != 2:
        raise ValueError("values must be 1-D or 2-D")
    if axis not in (0, 1, -1, -2):
        raise ValueError("axis must be 0 or 1")
    axis %= 2
    if axis == 1:
        x = x.T
        mask = None if mask is None else np.asarray(mask).T
        invalid = None if invalid is None else np.asarray(invalid).T
    xc = np.ascontiguousarray(x, dtype=np.float32)
    lev, rowbad, colbad = _levels(xc.shape, mask, invalid)
    det = np.zeros(xc.shape, np.bool_)
    xg, unit = to_grid(xc, chi1, max_window)
    _st_time(xg, lev, rowbad, colbad, unit, float(rho), _npass(max_window), det, False)
    if axis == 1:
        det = det.T
    return det[:, 0] if one else np.ascontiguousarray(det)


def sumthreshold_1d(values, mask=None, chi1=6.0, rho=1.5, max_window=32, invalid=None):
    """:func:`sumthreshold` on a single line (1-D arrays)."""
    return sumthreshold(np.asarray(values).reshape(-1), None if mask is None else np.asarray(mask).reshape(-1),
                        chi1, rho, max_window, 0,
                        None if invalid is None else np.asarray(invalid).reshape(-1))


def threshold_factors(iterations, start_scale):
    """Threshold factors of the iterations: geometric from ``start_scale`` down to
    1, f_i = start_scale ** ((I - 1 - i) / (I - 1)), i = 0 .. I - 1 (one iteration:
    [1])."""
    it = max(1, int(iterations))
    if it == 1:
        return (1.0,)
    return tuple(float(start_scale) ** ((it - 1 - i) / (it - 1)) for i in range(it))


def sumthreshold_flagger(values, mask=None, chi1=8.0, rho=1.5, max_window_time=32,
                         max_window_freq=128, iterations=3, start_scale=4.0,
                         background_time=15.0, background_freq=5.0, bandpass_dumps=0,
                         persist_dumps=0, persist_sigma=6.0, baseline_channels=64,
                         compact_sigma=0.0, invalid=None, sigma=None, t0=0, protect=None,
                         combine_feeds=False, wanted=None, reference=None):
    r"""Iterated SumThreshold flagger for one product's (time, channel) plane.

    Method (Offringa et al. 2010, MNRAS 405, 155): ``iterations`` times,

    1. fit a smooth background B (:func:`rfisieve.detect.background.coarse_smooth`, the
       coarse-grid form of the local fit of ``masked_smooth``; scales
       ``background_time`` dumps and ``background_freq`` channels, cells aligned
       to absolute dump numbers by ``t0``) with the input-flagged, invalid and
       so-far detected samples excluded;
    2. form the relative residual r = x / B - 1.  Relative units because the
       bandpass and the gain scale signal and noise alike (radiometer equation:
       sigma_x = B / sqrt(N)), so r has one noise level over the whole plane;
    3. take its noise sigma: ``sigma`` when given, else estimated once for the
       plane (:func:`rfisieve.detect.background.robust_sigma`: 1.4826 * MAD over
       unflagged valid samples, subsampled to 2**18);
    4. run :func:`sumthreshold` along time (windows up to ``max_window_time``) on
       the input mask, then along frequency (up to ``max_window_freq``) on the
       input mask joined by the time pass's detections, with chi_1 = ``chi1`` *
       f_i * sigma, f_i falling geometrically from ``start_scale`` to 1
       (:func:`threshold_factors`); the detections are the union of both
       directions.

    The frequency pass takes the time pass's detections as flagged (they enter
    its windows at chi_M, the paper's rule for flagged samples): a narrowband
    line found along time would otherwise enter every frequency window crossing
    it at its full excess (a 6-sigma line adds 6/32 sigma to the mean of a
    32-channel window, a sixth of chi_32 at chi1 = 8), and two such lines raise
    whole dumps of pure noise between them above chi_32.

    The detections of iteration i only steer the background fit of iteration
    i + 1; the result is the last iteration's detections.  Where the background
    has no valid sample within its kernel (wide flagged regions) it is filled by
    interpolation (see ``masked_smooth``), so such samples are still tested.

    Implementation: the residual is formed in the same pass as the background's
    interpolation; SumThreshold along time runs all window passes in one sweep
    down the dumps (no transpose), along frequency on cache-resident tiles of
    dumps, both on the integer grid of :func:`to_grid` (exact 32-bit sums; with
    a fixed ``sigma`` the residual is written straight onto the grid);
    buffers are reused between iterations and, per thread, between calls on
    planes of one shape (about 15 bytes per sample of the last plane stay
    allocated per thread, 19 when the noise is estimated per plane).  Compiled
    with ``nogil`` (the median too): threads flag planes in parallel.

    Parameters
    ----------
    values : array_like, shape (ntime, nchan)
        Power or amplitude x (complex visibilities: pass ``np.abs(vis)``).
    mask : array_like of bool, optional
        Already flagged samples (input, static, other detectors).
    chi1 : float
        chi_1 in units of the noise sigma of r.
    rho : float
        rho: chi_M = chi_1 / rho ** log2(M).
    max_window_time, max_window_freq : int
        Largest window M along time (dumps) and frequency (channels).
    iterations : int
        Number of background fits.
    start_scale : float
        Threshold factor of the first iteration.
    background_time, background_freq : float
        Background smoothing scales (dumps, channels).
    invalid : array_like of bool, optional
        Samples left out of every sum and of the fit.  Non-finite values are
        always treated as invalid.
    sigma : float, optional
        Fixed noise sigma of r used by every iteration (e.g. from
        :func:`sumthreshold_noise` on a few windows of the scan), so that chunks
        of a scan are flagged with one threshold; None estimates it per
        iteration on this plane.
    t0 : int
        Absolute dump number of the plane's first row (the chunk start less the
        halo): aligns the background's time cells to the scan, so a chunk gives
        the whole scan's result whatever dump it starts at.
    bandpass_dumps : int
        T: with T > 0 the receiver's bandpass, each channel's lower quartile along
        time per aligned block of T dumps (:func:`rfisieve.detect.bandpass.block_bandpass`),
        is divided out before the background fit; 0 = off.
    persist_dumps, persist_sigma, baseline_channels : int, float, int
        The persistence test on block means (longest block, threshold z, half-width
        h of the running median over channels;
        :func:`rfisieve.detect.bandpass.persistent_flags`); needs ``bandpass_dumps``;
        ``persist_dumps`` 0 = off.
    compact_sigma : float
        Threshold of the compact boxes (:func:`rfisieve.detect.bandpass.compact_flags`)
        on the last residual, followed by the edge test
        (:func:`rfisieve.detect.bandpass.edge_flags`); 0 = both off.
    protect : array_like of bool (nchan,), optional
        Channels where the persistence test is off (protected sky lines).
    combine_feeds : bool
        The band key that makes the engine give a feed pair to
        :func:`combined_flagger`; without effect on one plane.
    wanted : (int, int), optional
        Plane rows [lo, hi) whose detections are needed (a chunk's core, with the
        merge's halo).  With the bandpass model on, rows farther from them than the
        rule of :func:`sumthreshold_halo` less the bandpass's reach serve only the
        bandpass estimate: everything after it runs without them, and their
        detections are returned False.  The detections of the rows within the halo
        rule's reach are unchanged (the engine's chunk-invariance tests check it).
    reference : array_like (nchan,), optional
        The scan's reference bandpass shape
        (:func:`rfisieve.detect.bandpass.reference_of`, from a few windows spread over
        the scan, as ``sigma``).  With the persistence test on, the test also runs on
        each block's bandpass divided by it (fixed structure divides out: standing
        waves of a few channels' period that no spectral baseline follows), with its
        own roughness, and a channel found by either is a candidate.

    Returns
    -------
    numpy.ndarray of bool, shape (ntime, nchan)
        SumThreshold detections (not including ``mask`` nor ``invalid``).

    See Also
    --------
    sumthreshold_halo : halo of dumps needed for chunked processing.
    sumthreshold_noise : the noise sigma for ``sigma``.
    """
    return _flag(values, mask, chi1, rho, max_window_time, max_window_freq, iterations,
                 start_scale, background_time, background_freq, invalid, sigma, t0,
                 bandpass_dumps=bandpass_dumps, persist_dumps=persist_dumps, persist_sigma=persist_sigma,
                 baseline_channels=baseline_channels, compact_sigma=compact_sigma, protect=protect,
                 wanted=wanted, reference=reference, rest=_rest_after_bandpass(
                     dict(iterations=iterations, max_window_time=max_window_time,
                          background_time=background_time, bandpass_dumps=bandpass_dumps,
                          persist_dumps=persist_dumps, compact_sigma=compact_sigma), False))[0]


def combined_flagger(planes, sigmas, masks=None, invalids=None, t0=0, protect=None, wanted=None,
                     references=None, **settings):
    r"""SumThreshold on the two auto products of one feed pair together (both
    polarizations of one antenna).

    Method: one emitter reaches both polarizations (at strengths s_a, s_b) and their
    noise is independent, so the sum of the normalised residuals
    z = (r_a / sigma_a + r_b / sigma_b) / sqrt(2) has unit noise and the excess
    (s_a + s_b) / sqrt(2): for s_b = 0.8 s_a, 1.27 times a's own signal-to-noise
    (sums of independent Gaussians; common practice).  Each product is flagged on its
    own (:func:`sumthreshold_flagger`, every test: a product hit alone is still
    flagged), its last residual kept on SumThreshold's grid (in units of its own
    chi_1 sigma, so the two grids share one scale); SumThreshold (along time, then
    along frequency with the time pass's detections as flagged, thresholds chi_1 =
    ``chi1``, as in the flagger) and, with ``compact_sigma``, the compact boxes
    (:func:`rfisieve.detect.bandpass.compact_flags`) and the edge test
    (:func:`rfisieve.detect.bandpass.edge_flags`) run on z with the samples both
    products detected, and either's input flags, as flagged: a sample only one product
    detected enters z with its value, so a pulse one product found alone is flagged in
    the other too when the pair's sum passes; with the persistence test on, it runs on
    the pair's block means together (:func:`rfisieve.detect.bandpass.persistence_test`:
    each z of the test summed over the products, over sqrt(2)).  A sample found
    together is flagged in *both* products (the emitter is in both).  A sample invalid in either product is left
    out of z.  z is formed on the grid, rint((g_a + g_b) / sqrt(2)), clipped as the
    grid is (:func:`to_grid`).

    Parameters
    ----------
    planes : sequence of two ndarray (ntime, nchan)
        The products' powers x.
    sigmas : sequence of two float
        Each product's noise sigma (:func:`sumthreshold_noise`); None estimates it.
    masks, invalids : sequence of ndarray of bool, optional
        Per product, as for :func:`sumthreshold_flagger`.
    t0, protect, wanted, **settings
        As for :func:`sumthreshold_flagger` (``wanted``: both products run on the same
        rows, with the combined pass's reach added).
    references : sequence of two array_like, optional
        Each product's reference bandpass shape (``reference`` of
        :func:`sumthreshold_flagger`).

    Returns
    -------
    list of two ndarray of bool
        Each product's detections: its own, or'ed with those on z.
    """
    if len(planes) != 2 or len(sigmas) != 2:
        raise ValueError("combined_flagger takes the two products of one feed pair")
    masks = [None] * 2 if masks is None else list(masks)
    invalids = [None] * 2 if invalids is None else list(invalids)
    s = dict(settings)
    s.pop("enabled", None)
    s.pop("combine_feeds", None)
    own, kept = [], []
    rest = _rest_after_bandpass(s, True)
    refs = [None] * 2 if references is None else list(references)
    for x, sig, mk, inv, name, ref in zip(planes, sigmas, masks, invalids, ("pair", "work"), refs):
        keep = {}
        own.append(_flag(x, mk, invalid=inv, sigma=sig, t0=t0, protect=protect, keep=keep, scratch=name,
                         wanted=wanted, rest=rest, reference=ref, **s)[0])
        kept.append(keep)
    if not all(kept):       # a product without a valid sample: nothing to combine
        return own
    ka, kb = kept
    lo, hi = ka["rows"]     # the rows both products ran on (the same plane shape, the same rows)
    n, m = hi - lo, own[0].shape[1]
    mw = ka["max_window"]
    z = np.empty((n, m), ka["grid"].dtype)
    lev = np.empty((n, m), np.uint8)
    glo, ghi = _grid_args(1.0, mw)[1:]
    rowbad, colbad = kernels.pair_grid(ka["grid"], kb["grid"], ka["lev0"], kb["lev0"], own[0][lo:hi],
                                       own[1][lo:hi], 1.0 / np.sqrt(2.0), glo, ghi, z, lev)
    unit, rho = ka["unit"], float(s.get("rho", 1.5))
    hit = np.zeros((n, m), np.bool_)
    _st_time(z, lev, rowbad, colbad, unit, rho, _npass(s.get("max_window_time", 32)), hit, False)
    _st_freq(z, lev, rowbad, colbad, unit, rho, _npass(s.get("max_window_freq", 128)), hit, True)
    if s.get("compact_sigma", 0.0):
        hit |= compact_flags(z, lev, hit, unit / float(s.get("chi1", 8.0)), float(s["compact_sigma"]))
        # next to what either product detected; tested where at most one did (lev
        # holds those both did): a pulse's edge one product found alone is judged by z
        hit |= edge_flags(z, lev, hit | own[0][lo:hi] | own[1][lo:hi], unit / float(s.get("chi1", 8.0)),
                          done=hit)
    hit &= lev != kernels.LEV_INVALID
    out = own               # fresh arrays of _flag's: or'ed in place
    for d in out:
        d[lo:hi] |= hit
    if "blocks" in ka and "blocks" in kb:
        # the persistence test on the pair's block means together
        prot = None if protect is None else np.asarray(protect, dtype=np.bool_)
        for d, p in zip(out, persistence_test([ka["blocks"], kb["blocks"]], float(s.get("persist_sigma", 6.0)),
                                              prot)):
            d[lo:hi] |= p
    return out


def sumthreshold_noise(values, invalid=None, mask=None, t0=0, **settings):
    """Robust noise sigma of the relative residual r = x / B - 1 at the last
    iteration of :func:`sumthreshold_flagger` on this plane.

    Method: the flagger's iterations are run on ``values`` (background fits with
    the detections so far excluded, 1.4826 * MAD of r over unflagged valid
    samples, Hampel 1974, JASA 69, 383); the sigma of the last iteration is
    returned.  Meant for a pre-pass over a few fixed windows of a scan whose
    (e.g. median) value is then passed as ``sigma`` to every chunk, so chunks of
    any size get the same thresholds.

    Parameters
    ----------
    values : array_like, shape (ntime, nchan)
        Power or amplitude x.
    invalid, mask : array_like of bool, optional
        As for :func:`sumthreshold_flagger`.
    t0 : int
        Absolute dump number of the first row.
    **settings
        The flagger's settings (chi1, rho, max_window_time, max_window_freq,
        iterations, start_scale, background_time, background_freq).

    Returns
    -------
    float
        sigma (NaN when the plane holds no valid sample).
    """
    s = dict(settings)
    s.pop("enabled", None)
    s.pop("sigma", None)
    s.pop("protect", None)
    s.pop("combine_feeds", None)
    return _flag(values, mask, invalid=invalid, t0=t0, noise_only=True, **s)[1]


#: Detections this far above the background (in noise sigma) are left out of the
#: persistence test's block means (see rfisieve.detect.bandpass.persistent_flags).
STRONG_SIGMA = 4.0

_local = threading.local()


def _scratch(name="work"):
    """This thread's scratch buffers ``name`` of the flagger, reused between calls of the
    same plane shape (fresh pages cost a page fault each on first touch; the engine calls
    the flagger once per chunk and product from a few threads).  A feed pair's first
    product uses its own set (:func:`combined_flagger` keeps its buffers while the
    second product is flagged)."""
    sets = getattr(_local, "sets", None)
    if sets is None:
        sets = _local.sets = {}
    return sets.setdefault(name, {})


def _flag(values, mask=None, chi1=8.0, rho=1.5, max_window_time=32, max_window_freq=128,
          iterations=3, start_scale=4.0, background_time=15.0, background_freq=5.0,
          invalid=None, sigma=None, t0=0, bandpass_dumps=0, persist_dumps=0, persist_sigma=6.0,
          baseline_channels=64, compact_sigma=0.0, protect=None, noise_only=False, keep=None,
          scratch="work", wanted=None, rest=0, reference=None):
    """The flagger; returns (detections, sigma of the last iteration).  With ``keep``
    (a dict) it also gets the last iteration's residual on the grid (``grid``: chi_1
    sigma is ``unit`` steps, windows up to ``max_window``), the levels (``lev0``),
    this thread's buffers, and ``rows``, the plane rows [lo, hi) they hold (nothing when
    the plane has no valid sample).  With the bandpass on and ``wanted`` given, the
    bandpass is estimated on the whole plane and the rest runs on the rows within
    ``rest`` dumps of ``wanted`` (:func:`sumthreshold_flagger`)."""
    x = np.ascontiguousarray(values, dtype=np.float32)
    if x.ndim != 2:
        raise ValueError("values must be a 2-D (time, channel) plane")
    n, m = x.shape
    dummy = np.zeros((1, 1), np.bool_)
    inv = dummy if invalid is None else np.ascontiguousarray(invalid, dtype=np.bool_)
    flagged = dummy if mask is None else np.ascontiguousarray(mask, dtype=np.bool_)
    for name, a in (("invalid", invalid), ("mask", mask)):
        if a is not None and np.shape(a) != (n, m):
            raise ValueError("%s must have the shape of values %r" % (name, (n, m)))
    if n == 0 or m == 0:
        return np.zeros((n, m), np.bool_), float("nan")
    if sigma is not None:
        sigma = float(sigma)
        if not sigma > 0 or not np.isfinite(sigma):
            raise ValueError("sigma must be a positive finite number, not %r" % (sigma,))
    work = _scratch(scratch)
    lev0 = _buf(work, "lev0", np.uint8, (n, m))
    base_ex = _buf(work, "base_ex", np.bool_, (n, m))     # input-flagged or invalid
    rowbad, colbad = kernels.init_flagger(x, inv, invalid is not None, flagged, mask is not None,
                                          lev0, base_ex)
    full, lo, hi = n, 0, n
    if bandpass_dumps:
        # the bandpass per block, divided out: the surface then fits only gain and sky
        bp, rowblock = block_bandpass(x, base_ex, t0, int(bandpass_dumps))
        if wanted is not None:
            # rows farther than ``rest`` from the wanted ones served the bandpass only
            lo, hi = max(0, int(wanted[0]) - int(rest)), min(n, int(wanted[1]) + int(rest))
            lo, hi = (lo, hi) if lo < hi else (0, n)
        if (lo, hi) != (0, n):
            x, lev0, base_ex, rowbad = x[lo:hi], lev0[lo:hi], base_ex[lo:hi], rowbad[lo:hi]
            if colbad.any():
                colbad = np.count_nonzero(lev0 == kernels.LEV_INVALID, axis=0).astype(np.int64)
            first = rowblock[lo]
            rowblock = rowblock[lo:hi] - first
            bp = bp[first:rowblock[-1] + first + 1]
            t0, n = int(t0) + lo, hi - lo
    raw = x
    if bandpass_dumps:
        y = _buf(work, "bp_div", np.float32, (n, m))
        bpk.divide_rows(x, bp, rowblock, y)
        x = y
    some_dump_gone = bool(np.any(rowbad == m))   # the time pass does not write those dumps
    prev = _buf(work, "prev", np.bool_, (n, m))  # detections steering the next fit
    prev.fill(False)
    det = _buf(work, "det", np.bool_, (n, m))
    np_t = _npass(max_window_time)
    np_f = _npass(max_window_freq)
    mw = max(window_sizes(max_window_time)[-1], window_sizes(max_window_freq)[-1])
    gdt = grid_unit(mw)[1]
    bt, bf = float(background_time), float(background_freq)
    sig = float("nan")
    factors = threshold_factors(iterations, start_scale)
    rg = _buf(work, "st_grid", gdt, (n, m))
    for i, factor in enumerate(factors):
        c1 = float(chi1) * factor * (1.0 if sigma is None else sigma)
        if sigma is not None and c1 > 0:
            # fixed noise: the residual goes straight onto the grid (r is not stored)
            coarse_residual(x, base_ex, prev, lev0, bt, bf, rg, work, int(t0), grid=_grid_args(c1, mw))
            sig, unit = sigma, grid_unit(mw)[0]
        else:
            r = _buf(work, "resid", np.float32, (n, m))
            coarse_residual(x, base_ex, prev, lev0, bt, bf, r, work, int(t0))
            sig = robust_sigma2(r, base_ex, prev) if sigma is None else sigma
            if not np.isfinite(sig):
                return np.zeros((full, m), np.bool_), sig
            c1 = float(chi1) * factor * sig
            rg, unit = to_grid(r, c1, mw, rg)
        if i == len(factors) - 1:
            det = np.empty((n, m), np.bool_)     # the result: not a reused buffer
        if some_dump_gone:
            det.fill(False)
        _st_time(rg, lev0, rowbad, colbad, unit, float(rho), np_t, det, False)
        # frequency pass on lev0 joined by the time detections in det
        _st_freq(rg, lev0, rowbad, colbad, unit, float(rho), np_f, det, True)
        det, prev = prev, det
    if keep is not None and np.isfinite(sig):
        keep.update(grid=rg, lev0=lev0, unit=unit, max_window=mw, rows=(lo, hi))
    if noise_only or not np.isfinite(sig):
        return _whole(prev, lo, full), sig
    if compact_sigma:
        # compact shapes on the last residual (grid steps per sigma: unit / chi1)
        prev |= compact_flags(rg, lev0, prev, unit / float(chi1), float(compact_sigma))
        prev |= edge_flags(rg, lev0, prev, unit / float(chi1))
    if bandpass_dumps and persist_dumps:
        lengths = block_lengths(persist_dumps, bandpass_dumps)
        strong = prev & (rg > STRONG_SIGMA * unit / float(chi1))
        prot = None if protect is None else np.asarray(protect, dtype=np.bool_)
        blocks = BlockMeans(raw, base_ex, strong, bp, rowblock, int(t0), sig, int(baseline_channels), lengths,
                            prot, bandpass_dumps=int(bandpass_dumps), reference=reference)
        prev |= persistence_test([blocks], float(persist_sigma), prot)[0]
        if keep is not None:
            keep["blocks"] = blocks      # the pair's persistence test reuses its block means
    return _whole(prev, lo, full), sig


def _whole(det, lo, full):
    """Detections of plane rows lo .. lo + len(det), as a plane of ``full`` rows (the
    rows the flagger left out are False)."""
    if lo == 0 and det.shape[0] == full:
        return det
    out = np.zeros((full,) + det.shape[1:], np.bool_)
    out[lo:lo + det.shape[0]] = det
    return out


def sumthreshold_halo(settings):
    """Dumps of halo needed on each side of a chunk by :func:`sumthreshold_flagger`.

    Rule: one iteration makes the detection at dump t depend on the residual
    within the time reach of SumThreshold, R_st = sum over windows of (M - 1)
    (a window M holding t reaches M - 1 dumps away, and the flags it takes in
    come from smaller windows), and the residual at a dump depends on the
    previous iteration's detections within the background's reach R_b
    (:func:`rfisieve.detect.background.coarse_reach`: cells, box cascade on the cells,
    interpolation).  So ``halo = iterations * (R_st + R_b)``, rounded up to a
    multiple of the background's time cell c_t
    (:func:`rfisieve.detect.background.cell_size`).  The coarse background sums cells
    of c_t dumps aligned to absolute dump numbers when the flagger is given
    ``t0`` (the absolute index of the plane's first dump), so a chunk cut at
    any dump has the whole scan's cells; without ``t0`` the cells count from
    the plane's first dump, and only chunks starting at multiples of c_t match.
    With this halo, ``t0`` and one noise sigma for the scan (``sigma``, from
    :func:`sumthreshold_noise`), every sample at least ``halo`` dumps from a
    chunk end gets exactly the result of the whole plane; with the noise
    estimated per chunk the thresholds differ by its sampling error (about
    0.3 %), which moves samples whose window means lie that close to a
    threshold (~0.02 % of the samples with RFI).  Windows skip invalid samples, so invalid
    dumps inside the halo lengthen the reach by their number.  For the defaults
    (iterations 3, windows to 32, background_time 15, c_t = 8): 3 * (57 + 44) =
    303, rounded up to 304 dumps.

    With the bandpass divided out first (``bandpass_dumps`` = T), the residual at a
    dump depends on its block's bandpass, a quantile over the block and half a block
    on each side (reach 3 T / 2, :func:`rfisieve.detect.bandpass.bandpass_reach`),
    so the detections reach that much further; the persistence test's blocks nest
    in the bandpass blocks, but a shifted block across a bandpass boundary is tested
    as its two aligned halves, so a dump up to L / 2 from the boundary (L the longest
    block length under T) depends on the next bandpass block's window too (L / 2
    more), and the trimming of its runs' ends looks one part (``PART_DUMPS`` = 16)
    beyond; the compact boxes add their height less one (2 dumps) and the edge test
    (:func:`rfisieve.detect.bandpass.edge_flags`) one more.  For the L band (2
    iterations, T = 256, blocks of 256, 128 and 64, boxes of up to 3 dumps): 202 + 384 +
    64 + 16 + 3 = 669, rounded up to 672.  With ``combine_feeds`` (the engine gives a
    feed pair's two auto products to :func:`combined_flagger`) the pass on the summed
    residuals, which takes the samples both products detected as flagged, adds R_st
    once more, and its boxes and edge test 3 more: L band 669 + 57 + 3 = 729, rounded up
    to 736.

    Parameters
    ----------
    settings : dict
        The "sumthreshold" band settings (keys as in :mod:`rfisieve.config.defaults`);
        missing keys take the flagger's defaults.

    Returns
    -------
    int
        Halo in dumps (0 when the detector is disabled).
    """
    s = dict(settings or {})
    if not s.get("enabled", True):
        return 0
    ct = cell_size(float(s.get("background_time", 15.0)))
    halo = _reach_after_bandpass(s, bool(s.get("combine_feeds", False)))
    tb = int(s.get("bandpass_dumps", 0) or 0)
    if tb:
        # the residual at a dump depends on its block's bandpass: reach 3 T / 2
        halo += bandpass_reach(tb)
    return int(-(-halo // ct) * ct)


def _rest_after_bandpass(settings, pair):
    """Rows a wanted row's detections need beyond it once the bandpass is estimated
    (``wanted`` of :func:`sumthreshold_flagger`): the halo of :func:`sumthreshold_halo`
    less the bandpass's reach, so the rows kept lie as far inside the plane as a
    chunk's core lies inside its halo (``pair``: with the feed pair's combined pass)."""
    s = dict(settings, enabled=True, combine_feeds=bool(pair))
    return sumthreshold_halo(s) - bandpass_reach(int(s.get("bandpass_dumps", 0) or 0))


def _reach_after_bandpass(settings, pair):
    """The reach of :func:`sumthreshold_halo`'s rule less the bandpass's (unrounded):
    how far a detection depends on the residual once each row's bandpass is known
    (``pair``: with the feed pair's combined pass)."""
    s = settings
    it = max(1, int(s.get("iterations", 3)))
    r_st = sum(M - 1 for M in window_sizes(s.get("max_window_time", 32)))
    halo = it * (r_st + coarse_reach(float(s.get("background_time", 15.0))))
    tb = int(s.get("bandpass_dumps", 0) or 0)
    if tb:
        # the persistence test's blocks nest in the bandpass blocks, except the shifted
        # blocks across a bandpass boundary, tested as their two aligned halves: a dump
        # depends on the next block's window up to L / 2 away (L the longest block
        # length under T; at L = T they are left out), and the run ends' trimming looks
        # one part beyond
        if s.get("persist_dumps", 0):
            shorter = [L for L in block_lengths(int(s["persist_dumps"]), tb) if L < tb]
            halo += (max(shorter) // 2 if shorter else 0) + PART_DUMPS
    boxes = max(dt for dt, _ in COMPACT_SHAPES) - 1 + 1 if s.get("compact_sigma", 0.0) else 0
    # the boxes reach their height less one; the edge test one dump further
    halo += boxes
    if pair:
        # a feed pair's combined pass (:func:`combined_flagger`) runs SumThreshold once
        # more on the last residuals, with the products' detections as flagged (R_st
        # more), and its boxes and edge test again
        halo += r_st + boxes
    return halo

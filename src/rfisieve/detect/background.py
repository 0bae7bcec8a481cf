"""Smooth background surface of a time-frequency plane, and a robust noise estimate.

The background is a *normalised* (masked) smoothing: flagged and invalid samples
get weight zero and take no part in the fit.  The smoothing kernel is a separable
near-Gaussian made of repeated running-box filters, so the cost per sample does not
depend on the smoothing scale.
"""

import math

import numpy as np

from rfisieve.detect import _background_kernels as kernels

__all__ = ["box_radii", "box_reach", "cell_size", "coarse_radii", "coarse_reach", "coarse_smooth",
           "masked_smooth", "fit_background", "robust_sigma"]

#: Number of running-box passes per axis that make the near-Gaussian kernel.
BOX_PASSES = 3

#: MAD to standard deviation for Gaussian noise, 1 / Phi^-1(3/4) (common practice).
MAD_TO_SIGMA = 1.482602218505602

#: Largest number of samples :func:`robust_sigma` takes its medians over.
ROBUST_MAX_SAMPLES = 1 << 18

#: Samples per kernel standard deviation below which :func:`cell_size` stops
#: coarsening: a cell spans about sigma / CELLS_PER_SIGMA samples.
CELLS_PER_SIGMA = 2.0


def box_radii(sigma, passes=BOX_PASSES):
    """Half-widths of ``passes`` running boxes whose convolution approximates a
    Gaussian of standard deviation ``sigma`` samples.

    Method: a box of width w = 2 r + 1 has variance (w**2 - 1) / 12; ``passes``
    boxes of widths w_l (the largest odd width not above the ideal one) and
    w_l + 2 are mixed so that the total variance is as close as possible to
    sigma**2 (Kovesi 2010, "Fast almost-Gaussian filtering", Proc. DICTA, 121).
    By the central limit theorem three passes are already close to a Gaussian
    (the kernel is a piecewise quadratic with compact support).

    Parameters
    ----------
    sigma : float
        Standard deviation of the target Gaussian, in samples; 0 gives no
        smoothing (an empty tuple).
    passes : int
        Number of boxes.

    Returns
    -------
    tuple of int
        The half-widths r_k (box widths 2 r_k + 1), non-decreasing.
    """
    sigma = float(sigma)
    if not sigma > 0:
        return ()
    n = int(passes)
    w_ideal = math.sqrt(12.0 * sigma * sigma / n + 1.0)
    wl = int(math.floor(w_ideal))
    if wl % 2 == 0:
        wl -= 1
    wl = max(wl, 1)
    wu = wl + 2
    m = round((12.0 * sigma * sigma - n * wl * wl - 4 * n * wl - 3 * n) / (-4 * wl - 4))
    m = min(max(int(m), 0), n)
    return tuple((wl - 1) // 2 for _ in range(m)) + tuple((wu - 1) // 2 for _ in range(n - m))


def box_reach(sigma, passes=BOX_PASSES):
    """Reach of the smoothing kernel of :func:`box_radii`: the sum of its
    half-widths, i.e. a sample is influenced only by samples at most this many
    positions away along that axis."""
    return int(sum(box_radii(sigma, passes)))


def cell_size(sigma, per_sigma=CELLS_PER_SIGMA):
    """Cell edge (samples) used by :func:`coarse_smooth` along an axis of kernel
    scale ``sigma``: round(sigma / per_sigma), at least 1 (1 = no coarsening)."""
    sigma = float(sigma)
    if not sigma > 0:
        return 1
    return max(1, int(round(sigma / float(per_sigma))))


def coarse_radii(sigma, cell):
    """Box half-widths, in cells, of the coarse-grid kernel of :func:`coarse_smooth`.

    Method: the effective kernel is the cell average (a box of ``cell`` samples,
    variance (cell**2 - 1) / 12), the box cascade on the cell grid (variance
    sigma_c**2 cell**2) and the bilinear interpolation back (on average a
    triangle of half-width ``cell``, variance cell**2 / 6).  Variances add under
    convolution, so sigma_c**2 = (sigma**2 - (cell**2 - 1) / 12 - cell**2 / 6) /
    cell**2 matches the variance sigma**2 of the full-resolution kernel of
    :func:`box_radii`.  ``cell`` = 1 gives :func:`box_radii` (sigma) itself."""
    cell = int(cell)
    if cell <= 1:
        return box_radii(sigma)
    var = (float(sigma) ** 2 - (cell * cell - 1) / 12.0 - cell * cell / 6.0) / (cell * cell)
    return box_radii(math.sqrt(var)) if var > 0 else ()


def coarse_reach(sigma, cell=None):
    """Reach (samples) of :func:`coarse_smooth` along an axis: a value depends on
    samples at most this far away.  Bound: the two interpolation nodes lie
    within one cell of the sample, each node sums cells within its box reach
    R_c (in cells), and a cell spans ``cell`` samples, giving
    ceil((R_c + 1.5) cell - 0.5); for ``cell`` = 1 it is :func:`box_reach`."""
    cell = cell_size(sigma) if cell is None else int(cell)
    if cell <= 1:
        return box_reach(sigma)
    rc = int(sum(coarse_radii(sigma, cell)))
    return int(math.ceil((rc + 1.5) * cell - 0.5))


def _buf(work, name, dtype, shape):
    a = work.get(name)
    if a is None or a.shape != shape or a.dtype != dtype:
        a = np.empty(shape, dtype)
        work[name] = a
    return a


def _cell_offset(t0, ct):
    """Offset of the first cell boundary: cells hold absolute dumps k ct .. k ct +
    ct - 1, so the plane's first cell holds ct - off dumps (off = t0 mod ct)."""
    return int(t0) % int(ct)


def _coarse_grid(x, ex1, ex2, sigma_t, sigma_f, ct, cf, work, t0=0):
    """Node values G (float64, NaN gaps filled) of the coarse fit."""
    n, m = x.shape
    off = _cell_offset(t0, ct)
    ntc = -(-(n + off) // ct)
    nfc = -(-m // cf)
    mom = _buf(work, "mom", np.float64, (ntc, 5, nfc))
    kernels.cell_moments(x, ex1, ex2, ct, cf, off, mom)
    rt = coarse_radii(sigma_t, ct)
    if rt:
        mom = _time_cascade(mom, rt, work)
    G = _buf(work, "grid", np.float64, (ntc, nfc))
    nbad = kernels.coarse_solve(mom, np.array(coarse_radii(sigma_f, cf), np.int64), cf, G)
    if nbad:
        kernels.fill_gaps(G)
    return G


def _cascade_taps(radii):
    """Integer taps of the convolution of boxes of half-widths ``radii``."""
    k = np.ones(1)
    for r in radii:
        k = np.convolve(k, np.ones(2 * int(r) + 1))
    return k


def _time_cascade(mom, rt, work):
    """Zero-padded box cascade (half-widths rt) along the cell rows of mom
    (ntc, 5, nfc): the repeated running boxes on the end rows (within 2 R of
    an end, R the cascade's reach) and one pass of the cascade's 2 R + 1
    integer taps on the rows at least R from both ends, where the two are the
    same sums (one read of the grid instead of one per box)."""
    ntc, _, nfc = mom.shape
    tmp = _buf(work, "momt", np.float64, (ntc, 5, nfc))
    a2 = mom.reshape(ntc, 5 * nfc)
    R = int(sum(rt))
    if ntc < 6 * R + 2:
        b2 = tmp.reshape(ntc, 5 * nfc)
        s = np.empty(5 * nfc)
        for r in rt:
            kernels.box_axis0_f64(a2, int(r), b2, s)
            a2, b2 = b2, a2
        return a2.reshape(ntc, 5, nfc)
    out = tmp.reshape(ntc, 5 * nfc)
    kernels.taps_axis0(a2, _cascade_taps(rt), out, R, ntc - R)
    # end strips: the cascade on 3 R rows gives exact values on the R outer ones
    s = np.empty(5 * nfc)
    for sl, keep in ((slice(0, 3 * R), slice(0, R)), (slice(ntc - 3 * R, ntc), slice(2 * R, 3 * R))):
        e = np.ascontiguousarray(a2[sl])
        f = np.empty_like(e)
        for r in rt:
            kernels.box_axis0_f64(e, int(r), f, s)
            e, f = f, e
        out[sl][keep] = e[keep]
    return out.reshape(ntc, 5, nfc)


def coarse_smooth(values, exclude, sigma_t, sigma_f, cell=None, work=None, t0=0):
    r"""Fast approximation of :func:`masked_smooth` (``freq_order=1``) on a
    coarse grid.

    Method: the masked moments of the local fit (sums of w, w c, w c**2, w x,
    w x c, c the channel) are summed over cells of ``cell`` = (c_t, c_f) samples
    (default :func:`cell_size`, about sigma / 2 per axis), smoothed on the cell
    grid by the near-Gaussian box cascade of :func:`coarse_radii` (order zero
    along time) and solved for the weighted least-squares straight line along
    frequency at each cell centre, exactly as :func:`masked_smooth` does per
    sample; the cell-centre values are interpolated back bilinearly (held
    constant beyond the outer centres along time, extrapolated linearly along
    frequency).  Normalised convolution on a downsampled grid: Knutsson &
    Westin 1993, Proc. CVPR, 515; box cascade: Kovesi 2010, Proc. DICTA, 121.

    It keeps the exact properties of the full fit that the flagger relies on: a
    constant is returned exactly whatever is excluded, and a straight line along
    frequency exactly also next to holes and at band edges (the moments are
    exact sums; the fit is the same least-squares line); a plane in time and
    frequency is returned exactly away from holes and plane ends.  Elsewhere it
    differs from :func:`masked_smooth` by a small fraction of the background's
    own noise (measured in the tests).  The cost per sample is one pass that
    sums the cells and one that interpolates, whatever the scales.

    Parameters
    ----------
    values : array_like, shape (ntime, nchan)
        The plane x; cast to float32.
    exclude : array_like of bool, same shape
        True where w = 0.
    sigma_t, sigma_f : float
        Kernel scales along time (dumps) and frequency (channels).
    cell : tuple of int, optional
        Cell edges (c_t, c_f); (1, 1) reproduces :func:`masked_smooth` up to
        rounding.
    work : dict, optional
        Scratch buffers reused between calls of the same shape (internal).
    t0 : int
        Absolute dump number of the plane's first row.  Cells along time are
        aligned to absolute dumps (cell k holds dumps k c_t .. k c_t + c_t - 1),
        so a piece of a scan cut anywhere gets the same cells, and so the same
        background away from its ends, as the whole scan.

    Returns
    -------
    numpy.ndarray of float32, shape (ntime, nchan)
        The background B (gaps with no valid sample filled as ``fill =
        "interpolate"`` of :func:`masked_smooth`, on the cell grid).
    """
    x = _as_plane(values)
    ex = np.ascontiguousarray(exclude, dtype=np.bool_)
    if ex.shape != x.shape:
        raise ValueError("exclude has shape %r, values %r" % (ex.shape, x.shape))
    ct, cf = (cell_size(sigma_t), cell_size(sigma_f)) if cell is None else (int(cell[0]), int(cell[1]))
    out = np.empty(x.shape, np.float32)
    if x.size == 0:
        return out
    G = _coarse_grid(x, ex, ex, sigma_t, sigma_f, ct, cf, {} if work is None else work, t0)
    kernels.coarse_interp(G, ct, cf, _cell_offset(t0, ct), x, np.zeros((1, 1), np.uint8), out, 0,
                          np.empty((G.shape[0], x.shape[1])))
    return out


def coarse_residual(x, ex1, ex2, lev0, sigma_t, sigma_f, out, work, t0=0, grid=None):
    """r = x / B - 1 with B = :func:`coarse_smooth` (x, ex1 | ex2, t0=t0), 0 where
    lev0 is invalid, into out (internal; x float32 C-contiguous, ex1 ex2 bool).
    ``grid`` = (scale, lo, hi): out is an integer plane and gets r on SumThreshold's
    grid (:func:`rfisieve.detect._sumthreshold_kernels.to_grid` with these arguments), r itself is not
    stored."""
    ct, cf = cell_size(sigma_t), cell_size(sigma_f)
    G = _coarse_grid(x, ex1, ex2, sigma_t, sigma_f, ct, cf, work, t0)
    H = _buf(work, "interp", np.float64, (G.shape[0], x.shape[1]))
    if grid is None:
        kernels.coarse_interp(G, ct, cf, _cell_offset(t0, ct), x, lev0, out, 1, H)
    else:
        kernels.coarse_interp(G, ct, cf, _cell_offset(t0, ct), x, lev0, out, 2, H, *map(float, grid))


def _as_plane(values):
    x = np.ascontiguousarray(values, dtype=np.float32)
    if x.ndim != 2:
        raise ValueError("expected a 2-D (time, channel) plane, got shape %r" % (x.shape,))
    return x


def masked_smooth(values, exclude, sigma_t, sigma_f, fill="interpolate", freq_order=1, work=None):
    r"""Normalised (masked) smoothing of a time-frequency plane.

    Method: normalised convolution (Knutsson & Westin 1993, "Normalized and
    differential convolution", Proc. CVPR, 515) with weights w = 0 for excluded
    samples and 1 otherwise, and S the separable near-Gaussian kernel of
    :func:`box_radii` (scales sigma_t along time, sigma_f along frequency, zero
    outside the plane).  With ``freq_order=0`` it is of order zero,

    .. math:: B = \frac{S(w\,x)}{S(w)},

    which returns a constant exactly whatever is excluded, but is biased by slope
    times the shift of the weights' centroid next to holes and plane ends: at a
    band edge with a steep bandpass that bias is several noise sigma.  The default
    ``freq_order=1`` therefore fits, at every sample, a + b (c' - c) in channel
    c' by least squares with weights S's kernel times w, and returns a: order zero
    along time, a local straight line along frequency.  It returns constants and
    ramps along frequency exactly also next to holes and at the band edges (where
    the weights hold at least two channels); ramps along time are exact away from
    holes and ends (chunk ends are handled by halos).  Excluded samples (flagged
    or invalid; NaN allowed there) take no part.  Cost: ``BOX_PASSES`` running-box
    passes per axis on 2 (time) and 5 (frequency) moment arrays, O(1) per sample
    whatever the scales.

    Parameters
    ----------
    values : array_like, shape (ntime, nchan)
        The plane x (power or amplitude); cast to float32.
    exclude : array_like of bool, same shape
        True where w = 0 (flagged or invalid samples).
    sigma_t, sigma_f : float
        Kernel scales along time (dumps) and frequency (channels); 0 = none.
    freq_order : {1, 0}
        Order of the local fit along frequency (see above).
    fill : {"interpolate", "nan"}
        What to put where the kernel holds no sample with w = 1 (S(w) = 0):
        "interpolate" (default) fills each dump linearly between the nearest
        defined channels (the nearest value beyond the outermost ones), and dumps
        with no defined channel at all with the nearest defined dump; "nan"
        leaves NaN.  Only excluded samples can be in such regions (a sample with
        w = 1 is in its own kernel).
    work : dict, optional
        Scratch buffers reused between calls of the same shape (internal).

    Returns
    -------
    numpy.ndarray of float32, shape (ntime, nchan)
        The background B.
    """
    x = _as_plane(values)
    ex = np.ascontiguousarray(exclude, dtype=np.bool_)
    if ex.shape != x.shape:
        raise ValueError("exclude has shape %r, values %r" % (ex.shape, x.shape))
    n, m = x.shape
    if work is None:
        work = {}
    def buf(name, dtype, shape):
        a = work.get(name)
        if a is None or a.shape != shape or a.dtype != dtype:
            a = np.empty(shape, dtype)
            work[name] = a
        return a
    num = buf("num", np.float32, (n, m))
    den = buf("den", np.float32, (n, m))
    tnum = buf("tnum", np.float32, (n, m))
    tden = buf("tden", np.float32, (n, m))
    kernels.weights(x, ex, num, den)
    sa = np.empty(m)
    sb = np.empty(m)
    for r in box_radii(sigma_t):
        kernels.box2_axis0(num, den, r, tnum, tden, sa, sb)
        num, tnum = tnum, num
        den, tden = tden, den
    out = np.empty((n, m), np.float32)
    radii_f = np.array(box_radii(sigma_f), np.int64)
    if freq_order == 1:
        nbad = kernels.freq_local_linear(num, den, radii_f, out)
    elif freq_order == 0:
        for r in radii_f:
            kernels.box2_axis1(num, den, int(r), tnum, tden)
            num, tnum = tnum, num
            den, tden = tden, den
        nbad = kernels.ratio(num, den, out)
    else:
        raise ValueError("freq_order must be 0 or 1, not %r" % (freq_order,))
    if nbad and fill == "interpolate":
        kernels.fill_gaps(out)
    elif fill not in ("interpolate", "nan"):
        raise ValueError("fill must be 'interpolate' or 'nan', not %r" % (fill,))
    return out


def fit_background(values, mask=None, invalid=None, sigma_t=15.0, sigma_f=5.0,
                   fill="interpolate", freq_order=1, coarse=False):
    """Smooth background surface B of a (time, channel) plane, ignoring flagged
    and invalid samples: :func:`masked_smooth` with w = 0 where ``mask`` or
    ``invalid`` (or where the value is not finite).

    Parameters
    ----------
    values : array_like, shape (ntime, nchan)
        Power or amplitude (for complex visibilities pass ``np.abs``).
    mask, invalid : array_like of bool, optional
        Flagged samples and invalid samples; both are left out of the fit.
    sigma_t, sigma_f : float
        Smoothing scales along time (dumps) and frequency (channels).
    fill, freq_order
        See :func:`masked_smooth`.
    coarse : bool
        Use the fast coarse-grid approximation :func:`coarse_smooth` (the one
        :func:`rfisieve.detect.sumthreshold.sumthreshold_flagger` uses; ``fill`` and
        ``freq_order`` are then "interpolate" and 1).

    Returns
    -------
    numpy.ndarray of float32
        B, same shape as ``values``.

    References
    ----------
    Offringa A. R. et al. 2010, MNRAS 405, 155 (background surface fit with
    flagged samples excluded, iterated with the SumThreshold detection).
    """
    x = _as_plane(values)
    ex = ~np.isfinite(x)
    if mask is not None:
        ex |= np.asarray(mask, dtype=bool)
    if invalid is not None:
        ex |= np.asarray(invalid, dtype=bool)
    if coarse:
        return coarse_smooth(x, ex, sigma_t, sigma_f)
    return masked_smooth(x, ex, sigma_t, sigma_f, fill=fill, freq_order=freq_order)


def robust_sigma(x, mask=None, max_samples=ROBUST_MAX_SAMPLES):
    """Robust standard deviation: 1.4826 times the median absolute deviation
    from the median of the unmasked, finite samples.

    Method: sigma = 1.4826 * median(|x - median(x)|), the MAD scaled to the
    standard deviation of Gaussian noise (Hampel 1974, JASA 69, 383; common
    practice; equals ``scipy.stats.median_abs_deviation(x, scale="normal")``).
    When there are more than ``max_samples`` samples, the medians are taken over
    a deterministic strided subsample (every k-th sample of the flattened plane,
    k chosen coprime with the channel count so every channel is visited).  The
    relative standard error of the MAD is about 1.17 / sqrt(n) for Gaussian
    noise, so the default 2**18 samples give about 0.25 %, whatever the plane's
    size: stable to well under 1 % between a chunk and the whole plane.

    Parameters
    ----------
    x : array_like
        Samples (any shape; 2-D planes are subsampled along the flat index).
    mask : array_like of bool, optional
        True for samples to leave out.
    max_samples : int
        Largest number of samples the medians are taken over.

    Returns
    -------
    float
        The estimate (NaN when no sample is left).
    """
    a = np.ascontiguousarray(x, dtype=np.float32)
    ex = np.zeros(a.shape, np.bool_) if mask is None else np.ascontiguousarray(mask, dtype=np.bool_)
    if ex.shape != a.shape:
        raise ValueError("mask has shape %r, x %r" % (ex.shape, a.shape))
    if a.ndim == 0:
        a = a.reshape(1)
        ex = ex.reshape(1)
    step = max(1, -(-a.size // int(max_samples)))
    ncol = a.shape[-1]
    while step > 1 and math.gcd(step, ncol) != 1:
        step += 1
    out = np.empty(-(-a.size // step), np.float32)
    k = kernels.strided_sample(a, ex, ex, step, out)
    return _mad_sigma(out, k)


def _sample_step(size, ncol, max_samples=ROBUST_MAX_SAMPLES):
    step = max(1, -(-size // int(max_samples)))
    while step > 1 and math.gcd(step, ncol) != 1:
        step += 1
    return step


def robust_sigma2(x, ex1, ex2, max_samples=ROBUST_MAX_SAMPLES):
    """:func:`robust_sigma` (x, ex1 | ex2) without forming the union (internal;
    C-contiguous 2-D float32 x and bool ex1, ex2)."""
    step = _sample_step(x.size, x.shape[-1], max_samples)
    out = np.empty(-(-x.size // step), np.float32)
    k = kernels.strided_sample(x, ex1, ex2, step, out)
    return _mad_sigma(out, k)


def _mad_sigma(out, k):
    if k == 0:
        return float("nan")
    s = out[:k]
    med = _median_inplace(s)
    np.subtract(s, med, out=s)
    np.abs(s, out=s)
    return float(MAD_TO_SIGMA * _median_inplace(s))


def _median_inplace(s):
    """Median of the float32 array s (the mean of the two middle values for an
    even count, as numpy.median), reordering s.  One single-rank
    ``np.partition`` (numpy's vectorised selection, ~0.3 ms for 2**18 samples;
    numpy.median's two-rank partition takes ten times longer and holds the GIL
    as long) and, for an even count, the maximum below that rank."""
    k = s.shape[0]
    h = k // 2
    s.partition(h)
    hi = float(s[h])
    if k % 2:
        return hi
    return 0.5 * (hi + float(s[:h].max()))

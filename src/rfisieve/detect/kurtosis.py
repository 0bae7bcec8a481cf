"""Spectral kurtosis (SK) detector: estimator, thresholds and flagging functions.

Two modes (docs/design.md 4): (a) the backend recorded S2: one SK per dump with
M = ``accumulations`` (:func:`sk_flag_dumps`); (b) no S2: SK over blocks of M
consecutive dumps with N = ``accumulations`` (:func:`sk_flag_blocks`).  SK is for power
(auto products), not cross products.  Only k = N d enters the distribution of SK.

Threshold methods (:func:`sk_thresholds`), all built on the exact moments of
:mod:`rfisieve.detect.kurtosis_moments`:

``"pearson3"``
    Pearson type III (shifted, scaled gamma) matched to mean, variance and skewness
    (Nita & Gary 2010, PASP 122, 595).  Reproduces their Table 1 type III values.
``"pearson"``
    Four moments; Pearson's criterion kappa picks type I (beta), IV or VI (beta prime)
    (Pearson 1895; Nita & Gary 2010b).  With the exact moments kappa = 0.82 (type IV)
    for M = 300, N = 10, d = 1, where Nita & Gary's Table 1 lists a type VI fit; the
    type IV thresholds differ from theirs by 3.5e-4.
``"exact"`` (and ``"auto"``, the default; the two are the same)
    Lower tail: Skovgaard's conditional double-saddlepoint approximation of
    P(S2 <= y | S1 = s) for iid powers of density ~ p^(k-1) e^(a p) (the conditional law
    given S1 is the Dirichlet law of SK for any a); the cumulant generating function is
    computed by quadrature.  Upper tail (the powers' squares have no exponential
    moments there, so no saddlepoint): for M <= 8, or M <= 32 with N d <= 2, the exact
    stick-breaking recursion R_m = B^2 + (1 - B)^2 R_(m-1), B ~ Beta(k, (m-1) k), solved
    numerically on a grid; elsewhere the four-moment Pearson fit, which measured as well
    there.  M = 2 is solved in closed form.

Delivered tail probability / requested, lower/upper, by simulation of Gamma(k) powers
(1e8 gamma draws per (M, k), T trials; at 1e-5 the counts are only
T * 1e-5, e.g. 16 for M = 64 and 3 for M = 300, so those entries are noise)::

    M    k=Nd  T      method    1e-3        1e-4        1e-5
    8    0.5   1.2e7  exact     1.01/0.98   1.06/1.00   1.11/1.09
                      pearson  31.5 /0.80 302  /0.01  2991 /0.00
                      pearson3 15.4 /0.62 134  /0.00  1292 /0.00
    8    1     1.2e7  exact     1.04/1.01   1.04/1.04   0.95/0.82
                      pearson  15.5 /1.10 127  /0.63  1186 /0.06
    8    10    1.2e7  exact     1.01/1.01   0.99/1.01   0.98/0.90
                      pearson   0.29/1.01   0.00/1.02   0.00/1.03
    8    1024  1.2e7  exact     1.00/1.02   1.02/1.04   1.10/0.98
    16   0.5   6.2e6  exact     1.00/1.02   1.05/1.01   1.04/1.02
    16   1     6.2e6  exact     1.00/1.02   1.02/1.03   0.86/1.02
                      pearson   4.05/1.10  15.7 /0.97  82.7 /0.62
    16   10    6.2e6  exact*    1.00/1.02   0.98/1.06   1.02/1.10
    16   1024  6.2e6  exact*    0.97/0.98   1.02/1.00   0.82/0.99
    32   0.5   3.1e6  exact     0.97/1.01   0.92/1.13   1.12/1.02
    32   1     3.1e6  exact     1.01/1.04   1.03/1.06   1.44/0.99
    32   10    3.1e6  exact*    1.00/1.02   0.99/1.02   0.77/1.09
    64   0.5   1.6e6  exact     1.01/1.08   1.11/0.93   2.1 /0.51
    64   1     1.6e6  exact     1.04/0.99   1.20/1.10   1.02/1.15
                      pearson3 13.1 /1.52  92   /3.17  778  /8.5
    64   1024  1.6e6  exact     0.94/0.99   0.96/0.88   1.02/1.22
    300  0.5   3.3e5  exact     0.99/0.98   1.17/1.02   (noise)
    300  1     3.3e5  exact     0.96/0.97   0.75/1.08   (noise)
    300  10    3.3e5  exact     0.98/1.02   1.14/1.26   (noise)
                      pearson3  0.98/0.90   1.08/0.54   (noise)
    300  1024  3.3e5  exact     0.91/0.95   0.93/1.02   (noise)

    (* upper tail from the Pearson fit: the figures are those measured for "pearson".)
    M = 4: exact lower tail 1.07-1.10 (saddlepoint error grows as M falls), upper 0.92-1.01.

So "exact" holds both tails to about 10 % wherever the counts resolve it, while the
three-moment fit's lower tail is off by factors 10-5000 for M N d below a few hundred,
and the four-moment fit's by factors 4-3000 for N d <= 1 and M <= 32.

Cost of the block flagger (mode b, M = 16, N = 256, PFA = 1e-3 per tail, half-overlap,
8192 x 256 plane): pure noise loses 0.22 % of clean samples (whole-block flagging:
0.40 %); pulses of 1-4 dumps every 50 dumps in a quarter of the channels, amplitude
0.5 or 1.0 of the mean power (8 or 16 noise sigma): recall 0.98 / 1.00 with 0.16 %
clean samples lost in those channels (whole-block: recall 1.00, 48 % lost); at 0.2
(3 sigma) recall 0.24 (whole-block 0.54, 17 % lost).  Speed, one core, 4096 x 4096
float32: blocks ~100, dumps ~85 million samples/s (measured under load).
"""

import math

import numpy as np

from rfisieve.detect._kurtosis_kernels import (_block_histogram_kernel, _flag_blocks_kernel,
                                               _flag_dumps_kernel)
from rfisieve.detect.kurtosis_cache import _thresholds_cached
from rfisieve.detect.kurtosis_moments import shape_k, sk_central_moments, sk_moments, sk_raw_moments  # noqa: F401
from rfisieve.detect.kurtosis_thresholds import METHODS, pearson_kappa  # noqa: F401

__all__ = [
    "sk_estimator",
    "sk_moments",
    "sk_raw_moments",
    "sk_central_moments",
    "sk_thresholds",
    "sk_thresholds_sigma",
    "sk_threshold_table",
    "sk_flag_dumps",
    "sk_flag_blocks",
    "block_halo",
    "METHODS",
]


# ---------------------------------------------------------------------------
# Estimator
# ---------------------------------------------------------------------------

def sk_estimator(s1, s2, m, n=1, d=1.0):
    """Generalized spectral kurtosis estimator.

    ``SK = (M N d + 1) / (M - 1) * (M S2 / S1^2 - 1)`` (Nita & Gary 2010, MNRAS 406, L60,
    eq. 8).  E[SK] = 1 for Gaussian noise.

    Parameters
    ----------
    s1 : array_like
        S1 = sum of the M powers P_i.
    s2 : array_like
        S2 = sum of the squared powers P_i^2.
    m : int or array_like
        M, the number of powers summed (may be an array broadcasting with ``s1``, for
        blocks with fewer valid dumps).  Where M < 2 the result is NaN.
    n : int or array_like
        N, raw powers presummed into each P_i.
    d : float
        Shape factor: 1 for complex voltages, 0.5 for real voltages.

    Returns
    -------
    ndarray
        SK, float64 (NaN where M < 2 or S1 is 0).
    """
    s1 = np.asarray(s1, dtype=np.float64)
    s2 = np.asarray(s2, dtype=np.float64)
    m = np.asarray(m, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        sk = (m * n * d + 1.0) / (m - 1.0) * (m * s2 / (s1 * s1) - 1.0)
    return np.where(m >= 2, sk, np.nan)


def sk_thresholds(m, n=1, d=1.0, pfa=0.0013499, method="auto"):
    """Lower and upper SK thresholds, each tail holding probability ``pfa``.

    Parameters
    ----------
    m : int
        M, number of powers in one estimate (>= 2).
    n : int
        N, raw powers presummed into each power.
    d : float
        Shape factor d (1 complex voltage, 0.5 real voltage).
    pfa : float
        False-alarm probability of each tail, 0 < pfa < 0.5 (the default is
        ``scipy.stats.norm.sf(3)``, the "3 sigma" of Nita & Gary 2010, PASP 122, 595).
    method : {"auto", "exact", "pearson", "pearson3"}
        See the module docstring for what each does and how accurate it is.

    Returns
    -------
    (lower, upper) : tuple of float
        Flag SK < lower or SK > upper.
    """
    m = int(m)
    if m < 2:
        raise ValueError(f"SK needs M >= 2, got {m}")
    pfa = float(pfa)
    if not 0.0 < pfa < 0.5:
        raise ValueError(f"pfa must lie in (0, 0.5), got {pfa}")
    if method not in METHODS:
        raise ValueError(f"unknown SK threshold method {method!r}; expected one of {METHODS}")
    return _thresholds_cached(m, shape_k(n, d), pfa, method)


def gaussian_tail(sigma):
    """P(Z > sigma) for a standard normal Z: erfc(sigma / sqrt(2)) / 2 (the "sigma" of a
    PFA; equal to ``scipy.stats.norm.sf(sigma)`` to a few units of 1e-16, relative)."""
    return 0.5 * math.erfc(float(sigma) / math.sqrt(2.0))


def sk_thresholds_sigma(m, n=1, d=1.0, sigma=3.0, method="auto"):
    """:func:`sk_thresholds` with ``pfa = gaussian_tail(sigma)`` per tail."""
    return sk_thresholds(m, n, d, pfa=gaussian_tail(sigma), method=method)


def sk_threshold_table(m_max, n=1, d=1.0, pfa=0.0013499, method="auto", min_valid=4):
    """Thresholds for every block length M' = 0..m_max, as two float64 arrays.

    Entries with M' < max(min_valid, 2) are NaN (such blocks are not tested).
    """
    lo = np.full(int(m_max) + 1, np.nan)
    hi = np.full(int(m_max) + 1, np.nan)
    for mm in range(max(int(min_valid), 2), int(m_max) + 1):
        lo[mm], hi[mm] = sk_thresholds(mm, n, d, pfa, method)
    return lo, hi


# ---------------------------------------------------------------------------
# Flagging
# ---------------------------------------------------------------------------


def _as_plane(x, name):
    x = np.asarray(x)
    if x.ndim != 2:
        raise ValueError(f"{name} must be a 2-d (time, channel) array, got shape {x.shape}")
    if np.iscomplexobj(x):
        x = np.abs(x)
    if x.dtype not in (np.float32, np.float64):
        x = x.astype(np.float32)
    return np.ascontiguousarray(x)


def _valid_plane(valid, shape):
    if valid is None:
        return np.ones(shape, dtype=np.bool_)
    v = np.ascontiguousarray(np.asarray(valid, dtype=np.bool_))
    if v.shape != shape:
        raise ValueError(f"valid has shape {v.shape}, expected {shape}")
    return v


def sk_flag_dumps(power, s2, m, n=1, d=1.0, lower=None, upper=None, valid=None, *,
                  power_is_sum=False, pfa=0.0013499, method="auto"):
    """Mode (a): SK of every dump from a backend-recorded S2; flag it outside the thresholds.

    Each dump accumulated M raw powers (the scan's ``accumulations``), each itself a sum
    of N presummed powers (``presum``).  SK = (M N d + 1)/(M - 1) (M S2 / S1^2 - 1)
    (Nita & Gary 2010, MNRAS 406, L60).

    Parameters
    ----------
    power : array_like, (time, channel)
        By default the scan's ``/data`` plane, the MEAN power per dump, S1 / M; the
        function forms S1 = M * power.  Pass ``power_is_sum=True`` if it holds S1.
        Complex input is taken as its amplitude (SK is meant for auto products).
    s2 : array_like, (time, channel)
        The scan's ``/s2`` plane: S2, the sum of the M squared raw powers in the dump,
        in the same units as the raw powers (S1 = sum of the raw powers).
    m : int
        M, accumulations per dump.
    n, d : int, float
        N and d of the generalized estimator.
    lower, upper : float, optional
        Thresholds; when omitted they are ``sk_thresholds(m, n, d, pfa, method)``.
    valid : array_like of bool, optional
        False marks samples to leave out (never flagged here).
    power_is_sum, pfa, method
        See above.

    Returns
    -------
    ndarray of bool, (time, channel)
        True where SK is outside [lower, upper] for a valid sample with S1 > 0 and a
        finite S2.
    """
    power = _as_plane(power, "power")
    s2 = _as_plane(s2, "s2")
    if s2.shape != power.shape:
        raise ValueError(f"s2 shape {s2.shape} differs from power shape {power.shape}")
    valid = _valid_plane(valid, power.shape)
    m = int(m)
    if lower is None or upper is None:
        lo, hi = sk_thresholds(m, n, d, pfa, method)
        lower = lo if lower is None else lower
        upper = hi if upper is None else upper
    out = np.zeros(power.shape, dtype=np.bool_)
    scale = 1.0 if power_is_sum else float(m)
    _flag_dumps_kernel(power, s2, valid, scale, float(m * n * d), float(m), float(lower), float(upper), out)
    return out


def sk_block_histogram(power, valid, m, n, d, edges, t0=0, rows=None):
    """Histogram of block SK over the complete, fully valid blocks of M dumps aligned to
    absolute dump numbers (multiples of M) that start in ``rows`` of the plane.

    The review's kurtosis diagnostic: SK = (M N d + 1)/(M - 1) (M S2 / S1^2 - 1) per
    block (Nita & Gary 2010, MNRAS 406, L60), clipped into [edges[0], edges[-1]) and
    counted as ``numpy.histogram(sk, edges)`` counts them (``edges`` uniform, or
    uniform followed by a tail of wider bins, as :func:`uniform_bins` finds).  Each
    block is counted once over a scan cut into chunks, by the chunk whose ``rows`` hold
    its first dump.

    Parameters
    ----------
    power : array_like, (time, channel)
        Mean power per dump.
    valid : array_like of bool, (time, channel)
        False marks samples left out (a block holding one is not counted).
    m, n, d : int, int, float
        M (block length in dumps), N (raw powers per dump), shape factor d.
    edges : array_like
        Bin edges: uniform, then optionally wider (a geometric tail).
    t0 : int
        Absolute dump index of the plane's first row.
    rows : (int, int), optional
        Plane rows [start, stop) in which counted blocks start (default: all).

    Returns
    -------
    ndarray of int64, (len(edges) - 1,)
    """
    power = _as_plane(power, "power")
    valid = _valid_plane(valid, power.shape)
    edges = np.ascontiguousarray(edges, dtype=np.float64)
    m = int(m)
    r0, r1 = (0, power.shape[0]) if rows is None else (int(rows[0]), int(rows[1]))
    first = r0 + (-(int(t0) + r0)) % m
    nb = max(0, min((r1 - first + m - 1) // m, (power.shape[0] - first) // m))
    counts = np.zeros(edges.shape[0] - 1, dtype=np.int64)
    if nb > 0:
        _block_histogram_kernel(power, valid, first, nb, m, float(n * d), edges, uniform_bins(edges), counts)
    return counts


def uniform_bins(edges):
    """Number of leading bins of ``edges`` as wide as the first (to 1e-9 of it): the
    histogram kernel bins those by arithmetic and searches the rest."""
    w = np.diff(np.asarray(edges, dtype=np.float64))
    if w.size == 0:
        return 0
    wider = np.flatnonzero(np.abs(w - w[0]) > 1e-9 * max(abs(w[0]), 1e-300))
    return int(wider[0]) if wider.size else int(w.size)


def block_halo(m):
    """Dumps the engine must read on each side of a chunk for :func:`sk_flag_blocks`.

    A dump's result depends on every block that contains it, and those blocks reach at
    most M - 1 dumps to either side: the halo is M - 1 (for any step).
    """
    return int(m) - 1


def sk_flag_blocks(power, valid=None, m=16, n=1, d=1.0, pfa=0.0013499, method="auto", *,
                   thresholds=None, t0=0, step=None, min_valid=4, refine=True):
    """Mode (b): SK over blocks of M consecutive dumps of each channel (no recorded S2).

    Each dump is one power P_i = mean of N raw powers (N = the scan's ``accumulations``),
    so the P_i of Gaussian noise are Gamma(N d) and SK = (M' N d + 1)/(M' - 1)
    (M' S2 / S1^2 - 1) with S1, S2 the sums of P_i, P_i^2 over the M' valid dumps of the
    block (Nita & Gary 2010, MNRAS 406, L60).  Each M' has its own thresholds.

    Blocks start at absolute dump indices that are multiples of ``step`` (default M // 2:
    half-overlapping blocks), so the result does not depend on where a processing chunk
    starts; every dump lies in M / step blocks.  The halo the engine must read on each
    side of a chunk is :func:`block_halo` (M - 1 dumps), clipped at the scan's ends
    (blocks there are shorter).

    Inside a block that fails:

    - low SK (SK < lower: a steady emitter filling the block) flags all its valid dumps;
    - high SK (an intermittent emitter) drops the brightest dumps one at a time and flags
      only those dropped, stopping as soon as the rest of the block passes the upper
      threshold of its new M''; if fewer than ``min_valid`` would remain the whole block
      is flagged (``refine=False`` flags whole blocks in both cases).

    Parameters
    ----------
    power : array_like, (time, channel)
        Mean power per dump (the scan's ``/data`` plane of one auto product; the scale
        cancels).  Complex input is taken as its amplitude.
    valid : array_like of bool, optional
        False marks dumps left out of the sums (and never flagged here).
    m : int
        M, the block length in dumps.
    n : int
        N, raw powers averaged into one dump (``accumulations``).
    d : float
        Shape factor d.
    pfa : float
        False-alarm probability per tail of one block.
    method : str
        Threshold method of :func:`sk_thresholds`.
    thresholds : (lower, upper) arrays, optional
        Thresholds indexed by M' (length >= M + 1), e.g. from
        :func:`sk_threshold_table`; overrides ``pfa`` and ``method``.
    t0 : int
        Absolute dump index of the first row of ``power``.
    step : int, optional
        Block step in dumps (default max(M // 2, 1)).
    min_valid : int
        Blocks with fewer valid dumps are not tested (at least 3).
    refine : bool
        Flag only the outstanding dumps of high-SK blocks (see above).

    Returns
    -------
    ndarray of bool, (time, channel)
    """
    power = _as_plane(power, "power")
    valid = _valid_plane(valid, power.shape)
    m = int(m)
    if m < 2:
        raise ValueError(f"block length M must be >= 2, got {m}")
    step = max(m // 2, 1) if step is None else int(step)
    if not 1 <= step <= m:
        raise ValueError(f"block step must lie in 1..M, got {step}")
    min_valid = max(int(min_valid), 3)
    if thresholds is None:
        lo, hi = sk_threshold_table(m, n, d, pfa, method, min_valid)
    else:
        lo = np.asarray(thresholds[0], dtype=np.float64)
        hi = np.asarray(thresholds[1], dtype=np.float64)
        if lo.shape[0] < m + 1 or hi.shape[0] < m + 1:
            raise ValueError("thresholds must be indexed by M' = 0..M")
    out = np.zeros(power.shape, dtype=np.bool_)
    _flag_blocks_kernel(power, valid, int(t0), m, step, float(n * d), lo, hi, min_valid,
                        bool(refine), out)
    return out

"""Growth of a flag mask by the scale-invariant rank (SIR) operator.

Two forms:

* the published operator (Offringa, van de Gronde & Roerdink 2012, A&A 539, A95),
  ``max_reach=None``: a sample is flagged when it lies in *some* interval in which
  a fraction of at least 1 - eta is flagged.  A flagged run of L samples grows by
  eta L / (1 - eta) on each side, so long runs (a pulse train over 1600 dumps, a
  carrier across many channels) eat hundreds of clean samples beside them;
* the project's **bounded-reach variant**, ``max_reach=R``: the same rule with the
  intervals restricted to those reaching at most R samples to either side of the
  sample (Y1 >= y - R and Y2 <= y + 1 + R).  Growth beside a run is then at most
  floor(eta (R + 1)) samples, whatever the run's length, while short gaps
  (in intermittent emitters) and weak skirts next to short flagged runs are
  filled exactly as by the published operator.  This restriction is ours, not
  the paper's.
"""

import math

import numpy as np

from rfisieve.detect import _growth_kernels as kernels_morph

__all__ = ["sir_operator", "sir_grow", "sir_halo"]


def _check_reach(max_reach):
    if max_reach is None:
        return None
    r = int(max_reach)
    if r != max_reach or r < 0:
        raise ValueError("max_reach must be a non-negative integer or None, got %r" % (max_reach,))
    return r


def sir_operator(mask, eta, axis=0, max_reach=None):
    r"""Scale-invariant rank (SIR) operator along one axis of a mask, optionally
    with bounded reach.

    Method (Offringa, van de Gronde & Roerdink 2012, A&A 539, A95): a sample y is
    flagged when it lies in some interval [Y1, Y2) (Y1 <= y < Y2) in which at
    least (1 - eta)(Y2 - Y1) samples are flagged.  Linear time per line: with
    w_i = eta - 1 + f_i (f_i in {0, 1}) and prefix sums W (W(0) = 0), sample y is
    flagged iff

    .. math:: \max_{Y_2 > y} W(Y_2) - \min_{Y_1 \le y} W(Y_1) \ge 0 .

    Bounded-reach variant (this project's restriction of the published operator;
    ``max_reach`` = R not None): only intervals with Y1 >= y - R and
    Y2 <= y + 1 + R count.  The constraint is separable per side, so y is
    flagged iff

    .. math:: \max_{y < Y_2 \le y + 1 + R} W(Y_2)
              - \min_{y - R \le Y_1 \le y} W(Y_1) \ge 0 ,

    two sliding-window extrema computed with monotonic deques: still linear
    time.  Beside an isolated flagged run of L samples the published operator
    grows floor(eta L / (1 - eta)) samples on each side; with reach R the growth
    on each side is min(floor(eta L / (1 - eta)), floor(eta (R + 1))) (for a
    clean sample g samples beyond the run's edge the best interval is
    [y - R, y + 1), holding R + 1 - g flagged samples of R + 1: derived from the
    definition and checked in the tests).  Gaps of clean samples between flagged ones are filled as by the published
    operator when the deciding interval fits in the reach.  R = 0 returns the
    input; R >= the line length is the published operator.

    Equality counts as flagged; a tolerance of 1e-9 absorbs rounding of the
    float64 prefix sums.  Flagged samples stay flagged; eta = 0 returns the input,
    eta = 1 flags everything.

    Parameters
    ----------
    mask : array_like of bool, 1-D or 2-D
        f, the input flags.
    eta : float
        eta in [0, 1], the aggressiveness.
    axis : int
        Axis of a 2-D mask along which the operator runs (0 = time).
    max_reach : int or None
        R, the longest reach of an interval to either side of the sample
        (samples); None (default) = the unrestricted published operator.

    Returns
    -------
    numpy.ndarray of bool
        The grown mask (including the input), shape of ``mask``.
    """
    f = np.asarray(mask, dtype=np.bool_)
    eta = float(eta)
    if not 0.0 <= eta <= 1.0:
        raise ValueError("eta must lie in [0, 1], got %r" % (eta,))
    reach = _check_reach(max_reach)
    if f.ndim == 1:
        return sir_operator(f[None, :], eta, axis=1, max_reach=reach)[0]
    if f.ndim != 2:
        raise ValueError("mask must be 1-D or 2-D")
    axis %= 2
    a = np.ascontiguousarray(f.T if axis == 0 else f)
    out = np.empty(a.shape, np.bool_)
    if a.size:
        if reach is None or reach >= a.shape[1]:
            kernels_morph.sir_rows(a, eta, out)
        else:
            kernels_morph.sir_rows_reach(a, eta, reach, out)
    return np.ascontiguousarray(out.T) if axis == 0 else out


#: Longest reach run by the fused kernel: its dense dumps cost O(R) per sample
#: (measured on par with the deques of :func:`sir_operator` at R = 64 on a
#: 2082 x 1024 plane flagged at random at 50 %); longer reaches use sir_operator.
_FUSED_MAX_REACH = 64


def _skip_threshold(eta, reach, n):
    """Least number k of flagged samples within the reach that a clean sample
    needs to be added by the bounded-reach operator (reach R < n) on a line of
    n samples; -1 when no clean sample can be added, 0 when the bound cannot be
    proven (every clean sample is then decided).

    An interval [Y1, Y2) of L = Y2 - Y1 samples (1 <= L <= min(2 R + 1, n))
    holding k flagged ones decides in exact arithmetic iff
    D = k - q L >= -tol (q = 1 - eta, tol = 1e-9, both the float64 values the
    kernel uses), i.e. iff k >= need(L) = ceil(q L - tol).  The kernel evaluates
    D as W(Y2) - W(Y1) with W(Y) = C(Y) - q Y in float64 (|C|, |Y| <= n), which
    is within 6 u n of D (u = 2**-53, standard rounding-error bounds).  If no
    q L - tol lies within 32 u (n + 1) of an integer (a margin covering that
    error, with room for the error of computing q L - tol here), every
    interval decides in float64 as in exact arithmetic, so a clean sample
    (k <= L - 1 in every interval containing it) with fewer than
    min {need(L) : need(L) <= L - 1} flagged samples within R of it is never
    added.  Derived from the definition (Offringa, van de Gronde & Roerdink
    2012, A&A 539, A95) and checked against the kernel in the tests.
    """
    q = 1.0 - eta
    L = np.arange(1, min(2 * reach + 1, n) + 1, dtype=np.float64)
    x = q * L - 1e-9
    if np.any(np.abs(x - np.rint(x)) <= (n + 1) * 2.0 ** -48):
        return 0
    need = np.ceil(x)
    ok = need <= L - 1
    if not ok.any():
        return -1
    return int(need[ok].min())


def sir_grow(mask, eta, time=True, freq=True, reach_time=None, reach_freq=None):
    """Grow a (time, channel) mask with the SIR operator along time and/or
    frequency, optionally with bounded reach.

    Both directions are applied to the *input* mask and the results are OR-ed
    (common practice; it makes the result independent of the order of the
    directions and keeps growth from compounding across them).  The result is
    that of :func:`sir_operator` along each direction OR-ed with the input.

    Implementation: the bounded-reach directions (reach R shorter than the
    line, R <= 64) run together in one sweep down the dumps
    (:func:`rfisieve.detect._growth_kernels.sir_grow_reach`), without transposing the
    plane: flagged samples are copied, and a clean sample is decided only when
    enough samples within R of it are flagged to possibly add it (a running
    count per channel along time, a prefix count per dump along frequency; the
    least count is derived from the definition); each decision uses the same
    prefix values and operations as :func:`sir_operator`, so the result is
    bit-identical to it.  Unbounded directions and longer reaches use
    :func:`sir_operator`.

    Parameters
    ----------
    mask : array_like of bool, shape (ntime, nchan)
        Flags to grow.
    eta : float
        SIR aggressiveness eta (Offringa, van de Gronde & Roerdink 2012,
        A&A 539, A95).
    time, freq : bool
        Directions to grow in.
    reach_time, reach_freq : int or None
        R of the project's bounded-reach variant along time (dumps) and
        frequency (channels), see :func:`sir_operator`; None = the unrestricted
        published operator.

    Returns
    -------
    numpy.ndarray of bool
        Grown mask, including the input.
    """
    f = np.asarray(mask, dtype=np.bool_)
    if f.ndim != 2 or not (time or freq):
        out = f.copy()
        if time:
            out |= sir_operator(f, eta, axis=0, max_reach=reach_time)
        if freq:
            out |= sir_operator(f, eta, axis=1, max_reach=reach_freq)
        return out
    eta = float(eta)
    if not 0.0 <= eta <= 1.0:
        raise ValueError("eta must lie in [0, 1], got %r" % (eta,))
    rt = _check_reach(reach_time) if time else None
    rf = _check_reach(reach_freq) if freq else None
    n, m = f.shape
    if n == 0 or m == 0:
        return f.copy()
    small = n < 2 ** 31 and m < 2 ** 31
    fast_t = time and rt is not None and rt < n and rt <= _FUSED_MAX_REACH and small
    fast_f = freq and rf is not None and rf < m and rf <= _FUSED_MAX_REACH and small
    kt = _skip_threshold(eta, rt, n) if fast_t else -1
    kf = _skip_threshold(eta, rf, m) if fast_f else -1
    out = np.empty((n, m), np.bool_)
    kernels_morph.sir_grow_reach(np.ascontiguousarray(f), eta,
                                 rt if kt >= 0 else -1, max(kt, 0),
                                 rf if kf >= 0 else -1, max(kf, 0), out)
    if time and not fast_t:
        out |= sir_operator(f, eta, axis=0, max_reach=rt)
    if freq and not fast_f:
        out |= sir_operator(f, eta, axis=1, max_reach=rf)
    return out


def sir_halo(eta, longest_interval=None, reach=None):
    """Halo (dumps on each side of a chunk) for the SIR operator along time.

    Published operator (``reach=None``).  Rule: computing on a chunk plus halo h
    only sees intervals [Y1, Y2) inside it, so the chunk result is a subset of
    the whole-line result, and equal to it for every sample whose deciding
    interval is at most h + 1 samples long.  A flagged run of L samples makes
    intervals of length up to L / (1 - eta) (it grows by eta L / (1 - eta) on
    each side), so ``h = ceil(longest_interval)`` with
    ``longest_interval = L / (1 - eta)`` for the longest run L that must be grown
    exactly.  No finite halo is exact for every mask (a run may be as long as the
    scan): since the operator is linear-time and the mask is one byte per sample,
    running it along time on the whole scan's mask after detection is the exact
    alternative.

    Bounded-reach variant (``reach`` = R, see :func:`sir_operator`): every
    interval that decides a sample y lies in [y - R, y + 1 + R), i.e. it reads
    the samples y - R .. y + R only, so a halo of R dumps is exact for every mask
    and every eta; this returns R + 1, one dump of margin (so the documented
    figure "reach_time + 1" is an upper bound safe against an off-by-one at the
    exclusive end Y2 = y + 1 + R).  0 when eta = 0.

    Parameters
    ----------
    eta : float
        eta in [0, 1) (eta = 1 is allowed with a finite reach).
    longest_interval : int, optional
        The longest flagged run L (dumps) whose growth must be exact (published
        operator only).
    reach : int, optional
        R along time of the bounded-reach variant, dumps.

    Returns
    -------
    int
        ceil(L / (1 - eta)) for the published operator, R + 1 with a finite
        reach (0 when eta = 0).
    """
    eta = float(eta)
    if eta <= 0:
        return 0
    r = _check_reach(reach)
    if r is not None:
        return r + 1
    if longest_interval is None:
        raise ValueError("the published operator needs longest_interval (no finite halo is exact)")
    if eta >= 1:
        raise ValueError("eta = 1 flags everything; no halo is finite")
    return int(math.ceil(int(longest_interval) / (1.0 - eta) - 1e-12))

"""Growth of a flag mask by the scale-invariant rank (SIR) operator."""

import math

import numpy as np

from . import kernels

__all__ = ["sir_operator", "sir_grow", "sir_halo"]


def sir_operator(mask, eta, axis=0):
    r"""Scale-invariant rank (SIR) operator along one axis of a mask.

    Method (Offringa, van de Gronde & Roerdink 2012, A&A 539, A95): a sample is
    flagged when it lies in some interval [Y1, Y2) in which at least
    (1 - eta)(Y2 - Y1) samples are flagged.  Linear time per line: with
    w_i = eta - 1 + f_i (f_i in {0, 1}) and prefix sums W (W(0) = 0), sample y is
    flagged iff

    .. math:: \max_{Y_2 > y} W(Y_2) - \min_{Y_1 \le y} W(Y_1) \ge 0 .

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

    Returns
    -------
    numpy.ndarray of bool
        The grown mask (including the input), shape of ``mask``.
    """
    f = np.asarray(mask, dtype=np.bool_)
    eta = float(eta)
    if not 0.0 <= eta <= 1.0:
        raise ValueError("eta must lie in [0, 1], got %r" % (eta,))
    if f.ndim == 1:
        return sir_operator(f[None, :], eta, axis=1)[0]
    if f.ndim != 2:
        raise ValueError("mask must be 1-D or 2-D")
    axis %= 2
    a = np.ascontiguousarray(f.T if axis == 0 else f)
    out = np.empty(a.shape, np.bool_)
    if a.size:
        kernels.sir_rows(a, eta, out)
    return np.ascontiguousarray(out.T) if axis == 0 else out


def sir_grow(mask, eta, time=True, freq=True):
    """Grow a (time, channel) mask with the SIR operator along time and/or
    frequency.

    Both directions are applied to the *input* mask and the results are OR-ed
    (common practice; it makes the result independent of the order of the
    directions and keeps growth from compounding across them).

    Parameters
    ----------
    mask : array_like of bool, shape (ntime, nchan)
        Flags to grow.
    eta : float
        SIR aggressiveness eta (Offringa, van de Gronde & Roerdink 2012,
        A&A 539, A95).
    time, freq : bool
        Directions to grow in.

    Returns
    -------
    numpy.ndarray of bool
        Grown mask, including the input.
    """
    f = np.asarray(mask, dtype=np.bool_)
    out = f.copy()
    if time:
        out |= sir_operator(f, eta, axis=0)
    if freq:
        out |= sir_operator(f, eta, axis=1)
    return out


def sir_halo(eta, longest_interval):
    """Halo (dumps on each side of a chunk) for the SIR operator along time.

    Rule: computing on a chunk plus halo h only sees intervals [Y1, Y2) inside
    it, so the chunk result is a subset of the whole-line result, and equal to it
    for every sample whose deciding interval is at most h + 1 samples long.  A
    flagged run of L samples makes intervals of length up to L / (1 - eta)
    (it grows by eta L / (1 - eta) on each side), so
    ``h = ceil(longest_interval)`` with ``longest_interval = L / (1 - eta)`` for the
    longest run L that must be grown exactly.  No finite halo is exact for every
    mask (a run may be as long as the scan): since the operator is linear-time and
    the mask is one byte per sample, running it along time on the whole scan's
    mask after detection is the exact alternative.

    Parameters
    ----------
    eta : float
        eta in [0, 1).
    longest_interval : int
        The longest flagged run L (dumps) whose growth must be exact.

    Returns
    -------
    int
        ceil(L / (1 - eta)) (0 when eta = 0).
    """
    eta = float(eta)
    if eta <= 0:
        return 0
    if eta >= 1:
        raise ValueError("eta = 1 flags everything; no halo is finite")
    return int(math.ceil(int(longest_interval) / (1.0 - eta) - 1e-12))

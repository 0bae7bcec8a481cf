"""Compiled (numba) inner loop of the bounded-reach SIR operator.

Works on C-contiguous 2-D bool planes and runs along axis 1 (the contiguous
axis); :mod:`rfisieve.morphology` transposes for the time axis.  Compiled with
``nogil=True`` (dask threads run in parallel) and ``cache=True``.  The public,
documented entry point is :func:`rfisieve.morphology.sir_operator`; the function
here checks nothing and overwrites its output argument.
"""

import numpy as np
from numba import njit

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

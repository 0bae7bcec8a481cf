"""Compiled (numba) preparation of one product's plane for the detectors.

One pass over a (time, channel) view of a read block (any strides, float or complex)
gives what :func:`rfisieve.masks.amplitude` and :func:`rfisieve.masks.invalid_mask`
give in several numpy passes, plus the samples the detectors must leave out.
``nogil=True`` so dask threads prepare planes in parallel; the function checks
nothing and overwrites its output arguments.
"""

import numpy as np
from numba import njit


@njit(nogil=True, cache=True)
def prepare_plane(data, auto, static, flags, has_flags, values, invalid, excluded):
    """values = amplitude(data) as float32; invalid = NaN, Inf, and for auto products
    power <= 0 (for cross products an exact 0); excluded = invalid, static channels
    and input flags (``flags`` read only when ``has_flags``)."""
    n, m = values.shape
    for t in range(n):
        for c in range(m):
            if auto:
                v = np.float32(data[t, c].real)
                bad = not (v > 0) or not np.isfinite(v)
            else:
                v = np.float32(abs(data[t, c]))
                bad = v == 0 or not np.isfinite(v)
            values[t, c] = v
            invalid[t, c] = bad
            ex = bad or static[c]
            if has_flags:
                ex = ex or flags[t, c]
            excluded[t, c] = ex

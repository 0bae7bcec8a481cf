"""Compiled (numba) preparation of one product's plane for the detectors.

One pass over a (time, channel) view of a read block (any strides, float or complex)
gives what :func:`rfisieve.detect.masks.amplitude` and :func:`rfisieve.detect.masks.invalid_mask`
give in several numpy passes, plus the samples the detectors must leave out.
``nogil=True`` so dask threads prepare planes in parallel; the function checks
nothing and overwrites its output arguments.
"""

import numpy as np
from rfisieve.detect._jit import njit


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


@njit(nogil=True, cache=True)
def merge_bits(det, extra, grown, use_grown, r0, r1, detected_bits, grown_bit, limit, cut_bit, out):
    """The merge of one plane's rows r0:r1 into ``out``: det | extra, plus ``grown_bit``
    where ``grown`` (when ``use_grown``) adds to samples without a ``detected_bits``
    bit; then, when ``limit`` < 1, ``cut_bit`` on the still unflagged samples of each
    row whose flagged fraction over channels exceeds ``limit``."""
    m = det.shape[1]
    for t in range(r0, r1):
        count = 0
        for c in range(m):
            d = det[t, c]
            v = d | extra[t, c]
            if use_grown and grown[t, c] and (d & detected_bits) == 0:
                v |= grown_bit
            out[t - r0, c] = v
            if v != 0:
                count += 1
        if limit < 1 and count / m > limit:
            for c in range(m):
                if out[t - r0, c] == 0:
                    out[t - r0, c] = cut_bit

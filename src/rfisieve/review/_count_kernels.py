"""One compiled pass that counts a block of a mask for the occupancy tables.

The numpy form of the counting rules (``np.count_nonzero`` along three axis sets, once
for "any bit" and once per cause bit) walks the block about twenty times; a profile of
the 134 M-sample scan of issue 11 put 17 s of the occupancy job's 23 s there.  This
pass visits each sample once: a sample with value 0 costs one compare, a flagged
sample with value ``v`` adds one to its channel, product x channel, dump, product and
image-bin totals and to the value histograms ``hist_c[c, v]``, ``hist_t[t, v]`` and
``hist_p[p, v]``.  The per-bit and primary-cause counts then follow exactly from the
histograms by an integer product with the 256 x nbits tables of :func:`value_tables`
(every count stays an exact int64; tests/test_occupancy.py checks them against brute
force written from the definition).
"""

import numpy as np

from rfisieve.detect._jit import njit


def value_tables(bit_values):
    """(has_bit, primary): int64 (256, nbits) tables over every uint8 mask value.

    ``has_bit[v, k]`` is 1 when value ``v`` has bit ``bit_values[k]`` set;
    ``primary[v, k]`` is 1 when that bit is the lowest set bit of ``v`` listed.
    """
    v = np.arange(256, dtype=np.int64)[:, None]
    b = np.asarray(bit_values, dtype=np.int64)[None, :]
    has_bit = ((v & b) != 0).astype(np.int64)
    lower = np.cumsum(has_bit, axis=1) - has_bit  # listed bits below k that are set
    primary = (has_bit & (lower == 0)).astype(np.int64)
    return has_bit, primary


@njit(cache=True, nogil=True)
def count_block(flags, tbin, cbin, ch_any, pc_any, dump_any, prod_any, hist_c, hist_t, hist_p, img):
    """Add the counts of ``flags`` (uint8 (nt, nc, np)) to the accumulators (in place).

    ``tbin`` (nt,) and ``cbin`` (nc,) are each dump's and channel's image bin;
    ``dump_any`` and ``hist_t`` are indexed by the block's own dumps.
    """
    nt, nc, npr = flags.shape
    for t in range(nt):
        tb = tbin[t]
        for c in range(nc):
            cb = cbin[c]
            for p in range(npr):
                v = flags[t, c, p]
                if v != 0:
                    ch_any[c] += 1
                    pc_any[p, c] += 1
                    dump_any[t] += 1
                    prod_any[p] += 1
                    hist_c[c, v] += 1
                    hist_t[t, v] += 1
                    hist_p[p, v] += 1
                    img[tb, cb] += 1

"""Mask algebra: invalid samples, static ranges, occupancy cuts, and the bit table.

Pure functions of numpy arrays; the bit values are in :mod:`rfisieve.bits`.
"""

import numpy as np

from rfisieve import bits


def amplitude(data, auto):
    """The value a flagger looks at: power for auto products, |V| for cross products.

    Parameters
    ----------
    data : ndarray, float or complex, any shape
        One product's samples as stored in the scan.
    auto : bool
        True for an auto product (its power is the real part; an imaginary part, if
        stored, is ignored), False for a cross product (flagged on its amplitude).
    """
    if np.iscomplexobj(data):
        out = data.real if auto else np.abs(data)
    else:
        out = data if auto else np.abs(data)
    return np.asarray(out, dtype=np.float32)


def invalid_mask(values, auto):
    """Samples no statistic may use: NaN, Inf, and zero or negative power.

    For auto products (power) zero and negative values are invalid; for cross
    products (amplitude) an exact zero is invalid (dropped dumps are written as zeros
    by most backends: common practice).  Returns a bool array shaped like ``values``.
    """
    values = np.asarray(values)
    bad = ~np.isfinite(values)
    if auto:
        bad |= values <= 0
    else:
        bad |= values == 0
    return bad


def static_channels(freq_hz, ranges):
    """Channels whose centre lies in any ``[start_mhz, stop_mhz]`` of ``ranges``.

    ``ranges`` is the band config's ``known_bad`` list of ``{start_mhz, stop_mhz, ...}``.
    Returns a bool array of shape ``(nchan,)``.
    """
    f_mhz = np.asarray(freq_hz, dtype=np.float64) / 1e6
    out = np.zeros(f_mhz.shape, dtype=bool)
    for r in ranges or ():
        lo, hi = sorted((float(r["start_mhz"]), float(r["stop_mhz"])))
        out |= (f_mhz >= lo) & (f_mhz <= hi)
    return out


def dump_cut(flagged, limit):
    """Dumps whose flagged fraction over channels exceeds ``limit``.

    Parameters
    ----------
    flagged : bool ndarray (time, chan)
        Samples flagged for any cause.
    limit : float
        Fraction in [0, 1]; 1 disables the cut.

    Returns
    -------
    bool ndarray (time,)
    """
    if limit >= 1:
        return np.zeros(flagged.shape[0], dtype=bool)
    return flagged.mean(axis=1) > limit


def channel_cut(flagged_counts, samples, limit):
    """Channels whose flagged fraction over a whole scan exceeds ``limit``.

    ``flagged_counts`` and ``samples`` are per-channel counts (any shape, broadcast).
    """
    if limit >= 1:
        return np.zeros(np.shape(flagged_counts), dtype=bool)
    samples = np.maximum(np.asarray(samples, dtype=np.float64), 1)
    return np.asarray(flagged_counts) / samples > limit


def bit_attrs():
    """The bit table as HDF5 attribute values (parallel arrays)."""
    return {
        "bit_index": np.array([b[0] for b in bits.BIT_TABLE], dtype=np.uint8),
        "bit_value": np.array([b[1] for b in bits.BIT_TABLE], dtype=np.uint8),
        "bit_name": np.array([b[2] for b in bits.BIT_TABLE], dtype=object),
        "bit_meaning": np.array([b[3] for b in bits.BIT_TABLE], dtype=object),
    }

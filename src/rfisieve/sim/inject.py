"""Injection of synthetic interference of known INR into an existing power plane.

For injection-recovery tests of detector thresholds.  The input plane is taken to hold
clean dump powers, each ``d = mu G / N`` with ``G ~ Gamma(N)`` (N = accumulations, the
radiometer equation's exact dump statistics).  Each kind is injected by drawing the
interfered dump *conditionally on the clean one*, so that the result has the exact
distribution of noise plus interference (Gamma / Dirichlet / sphere properties of
complex Gaussian noise; no new noise is added on top of the old):

noise-like for the whole dump (``noiselike``, ``burst``, ``intermittent`` noise)
    Power ``mu (1 + r)`` with ``r = inr / sqrt(N)``: ``d' = d (1 + r)`` (a scaled Gamma
    variate is Gamma with the scaled mean).
pulsed (fraction q of the raw spectra, ``n_p = round(q N)``)
    Given G, the share of the pulsed raw spectra is ``B ~ Beta(n_p, N - n_p)``,
    independent of G (Dirichlet property of i.i.d. exponentials):
    ``d' = d (1 + inr sqrt(N) B / n_p)``.
carrier (``carrier``, ``drifting``, ``intermittent`` carrier), power ``c``
    ``d' = d + c + 2 sqrt(c d) X``, ``X = 2 Beta(N - 1/2, N - 1/2) - 1``: the noise
    voltages form a vector of norm ``sqrt(N d)`` with uniform direction in C^N = R^2N,
    and X is the cosine between that direction and the carrier's.  The result is
    ``mu / (2N)`` times a noncentral chi-square with 2N degrees of freedom.  The carrier
    power needs ``mu``: pass it, or it is estimated per channel as the median over time
    divided by the median of Gamma(N) / N.

The scale and Beta forms are exact whatever mu is; the carrier form is exact given mu.
"""

import numpy as np

_NOISE = ("noiselike", "burst")
_CARRIER = ("carrier", "drifting")


def _region(shape, dumps, channels):
    mask = np.zeros(shape[:2], dtype=bool)
    t_index = np.arange(shape[0]) if dumps is None else dumps
    c_index = np.arange(shape[1]) if channels is None else channels
    mask[np.ix_(np.atleast_1d(np.arange(shape[0])[t_index]),
                np.atleast_1d(np.arange(shape[1])[c_index]))] = True
    return mask


def inject(data, kind, *, rng, accumulations, inr, dumps=None, channels=None,
           duty=0.05, drift_channels_per_dump=0.5, on_fraction=0.3, signal="carrier",
           products=None, mu=None):
    """Add synthetic interference of known INR to a plane of clean dump powers.

    Parameters
    ----------
    data : ndarray, shape (T, F) or (T, F, P)
        Clean mean powers per dump (not changed).
    kind : str
        ``"carrier"``, ``"pulsed"``, ``"burst"``, ``"drifting"``, ``"intermittent"`` or
        ``"noiselike"`` (see the module docstring for the draw used).
    rng : numpy.random.Generator
    accumulations : int
        N, raw spectra per dump.
    inr : float
        Interference-to-noise ratio: excess mean power over the dump's noise rms
        ``mu / sqrt(N)``.
    dumps, channels : index, slice or boolean array, optional
        Region of the plane (default all).  For ``drifting``, ``channels`` gives the
        first channel (default 0) of a line moving by ``drift_channels_per_dump``; for
        ``intermittent``, the dumps are a random fraction ``on_fraction`` of ``dumps``.
    duty : float
        q of ``pulsed``: fraction of a dump's raw spectra carrying the pulses.
    signal : {"carrier", "noise"}
        What an ``intermittent`` emitter sends.
    products : index, optional
        Products hit (default all) when ``data`` is 3-D.
    mu : ndarray broadcastable to data, optional
        Clean mean power, for the carrier kinds.

    Returns
    -------
    data_out : ndarray, same shape and dtype as ``data``
    truth_inr : ndarray float32, same shape: INR added per sample (0 elsewhere)
    """
    x = np.asarray(data)
    n = int(accumulations)
    if x.ndim not in (2, 3):
        raise ValueError(f"data must be 2-D or 3-D, got shape {x.shape}")
    if not inr > 0:
        raise ValueError("inr must be > 0")
    shape = x.shape
    plane = x.astype(np.float64)
    if kind == "drifting":
        c0 = 0 if channels is None else int(np.atleast_1d(np.arange(shape[1])[channels])[0])
        mask = np.zeros(shape[:2], dtype=bool)
        t_sel = np.arange(shape[0]) if dumps is None else np.atleast_1d(
            np.arange(shape[0])[dumps])
        for j, t in enumerate(t_sel):
            c = int(round(c0 + drift_channels_per_dump * j))
            if 0 <= c < shape[1]:
                mask[t, c] = True
    elif kind == "intermittent":
        mask = _region(shape, dumps, channels)
        rows = np.flatnonzero(mask.any(axis=1))
        off = rows[rng.random(rows.size) >= on_fraction]
        mask[off] = False
    elif kind in _NOISE + _CARRIER + ("pulsed",):
        mask = _region(shape, dumps, channels)
    else:
        raise ValueError(f"unknown kind {kind!r}")
    if x.ndim == 3:
        pmask = np.zeros(shape[2], dtype=bool)
        pmask[np.arange(shape[2]) if products is None else products] = True
        full = mask[:, :, None] & pmask[None, None, :]
    else:
        full = mask
    truth = np.zeros(shape, dtype=np.float32)
    truth[full] = inr
    d = plane[full]
    as_noise = kind in _NOISE or (kind == "intermittent" and signal == "noise")
    if as_noise:
        d = d * (1.0 + inr / np.sqrt(n))
    elif kind == "pulsed":
        n_p = int(round(duty * n))
        if not 1 <= n_p < n:
            raise ValueError(f"duty {duty} gives {n_p} of {n} raw spectra; need 1..N-1")
        share = rng.beta(n_p, n - n_p, size=d.shape)
        d = d * (1.0 + inr * np.sqrt(n) * share / n_p)
    else:
        if mu is None:
            from scipy import stats
            med = np.nanmedian(plane, axis=0, keepdims=True)
            mu_full = np.broadcast_to(med / (stats.gamma(n).median() / n), shape)
        else:
            mu_full = np.broadcast_to(np.asarray(mu, dtype=np.float64), shape)
        c = inr * mu_full[full] / np.sqrt(n)
        cosine = 2.0 * rng.beta(n - 0.5, n - 0.5, size=d.shape) - 1.0
        d = d + c + 2.0 * np.sqrt(c * np.clip(d, 0.0, None)) * cosine
    plane[full] = d
    return plane.astype(x.dtype, copy=False), truth

"""Small scan files for the engine tests: gamma-distributed dump powers.

A dump's mean power over N raw spectra of complex-voltage noise is Gamma(N, mu/N)
(radiometer equation: relative rms 1/sqrt(N); Wilson, Rohlfs & Huettemeister,
Tools of Radio Astronomy).  Interference is added as plain extra power here; the
demo simulator (rfisieve.sim.scans) models it at the voltage level.
"""

import h5py
import numpy as np


def make_scan(path, ntime=600, nchan=64, nprod=2, accumulations=256, seed=0, cross=False,
              band="L", s2=False, lines=True, upstream=False, dtype=np.float32):
    rng = np.random.default_rng(seed)
    ants = [f"pier{i + 1}.a" for i in range(nprod)]
    products = [f"{a}-{a}" for a in ants]
    if cross:
        products.append(f"{ants[0]}-{ants[1]}")
    npr = len(products)
    # a smooth bandpass with a few-percent standing-wave ripple of 30 channels' period
    ch = np.arange(nchan)
    bandpass = 1.0 + 0.3 * np.sin(np.pi * ch / nchan) + 0.03 * np.sin(2 * np.pi * ch / 30.0)
    data = np.empty((ntime, nchan, npr), dtype=np.complex64 if cross else dtype)
    truth = np.zeros((ntime, nchan, npr), dtype=bool)
    s2_arr = None
    if s2:
        raw = rng.exponential(size=(ntime, nchan, npr, accumulations))
        power = raw.mean(axis=-1)
        s2_arr = (raw ** 2).sum(axis=-1).astype(np.float32)
    else:
        power = rng.standard_gamma(accumulations, size=(ntime, nchan, npr)) / accumulations
    power = power * bandpass[None, :, None]
    sigma = 1.0 / np.sqrt(accumulations)
    if lines:
        for c in (nchan // 5, nchan // 2):
            power[:, c, :] *= 1 + 6 * sigma
            truth[:, c, :] = True
        t = ntime // 3
        power[t:t + 3] *= 1 + 8 * sigma
        truth[t:t + 3] = True
    if cross:
        for p in range(npr - 1):
            data[:, :, p] = power[:, :, p]
        noise = (rng.normal(size=(ntime, nchan)) + 1j * rng.normal(size=(ntime, nchan))) * sigma
        data[:, :, -1] = (0.1 + noise) * bandpass[None, :]
    else:
        data[...] = power
    with h5py.File(path, "w") as f:
        f["data"] = data
        f["time"] = 1.8e9 + np.arange(ntime) * 2.0
        f["freq"] = 1.40e9 + np.arange(nchan) * 500e3
        f["products"] = np.array(products, dtype=object)
        if s2_arr is not None:
            f["s2"] = s2_arr
        if upstream:
            fl = np.zeros(data.shape, dtype=np.uint8)
            fl[:10] = 1
            f["flags"] = fl
        f.attrs.update(band=band, integration_time=2.0, channel_width=500e3, accumulations=accumulations)
    return truth

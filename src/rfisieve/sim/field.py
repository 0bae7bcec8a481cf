"""Field scenes: scans built the way a receiver's data look, for judging the flagger
on interference it was not tuned on (bench/quality.py, tests).

Instrument (invented for the demo observatory, physical in kind):

* a digitised band of ``nchan`` channels of ``channel_width`` (default 1024 x
  62.5 kHz = 64 MHz) whose anti-aliasing filter rolls off steeply at both edges:
  flat to a sharp knee, then an exponential fall of ``edge_drop`` (50x) over
  ``edge_channels`` (20) channels (:func:`field_bandpass`), plus an in-band
  shoulder (a 30 % step over 6 channels, e.g. a diplexer's skirt), a slow dome and
  a standing-wave ripple (period c / 2L, L = 5 m: common practice);
* two polarizations (``inputs``, each with its own bandpass ripple phase and gain)
  that see the same emitters, the second at ``second_strength`` (0.8) of the first's
  INR (emitters are polarized; the noise is independent);
* a slow gain drift per input: a few % sinusoid and trend over the scan;
* N = ``accumulations`` raw spectra per dump: a clean dump's power is
  Gamma(N, mu / N) (radiometer equation, relative rms 1 / sqrt(N)).

Emitters add power at the dump level: a dump whose interference adds mean excess
``e`` is drawn as Gamma(N, (mu + e) / N) (noise-like excess); a pulse filling a
fraction ``q`` of the dump is drawn as Gamma((1 - q) N, mu / N) + Gamma(q N, (mu + e / q)
/ N), so that its per-dump kurtosis is right.  INR = e / (mu / sqrt(N)), as in
:mod:`rfisieve.sim.scans`.

Emitter kinds (the truth ``kinds`` attribute; codes of their own, 11-20):

============ ==================================================================
satellite    ~40 channels with steep skirts, rising and setting smoothly over
             ~1500 dumps to a peak of 2-4 sigma
wideband     noise-like digital transmitter, 20-30 channels, on for 600-900
             dumps at 1-2 sigma
switching    extended emitter (10-30 channels) that switches on and off in
             stretches of tens to hundreds of dumps
tdma         2 channels, frames of 4 dumps on and 4 off, in active periods of
             ~200 dumps
fracpulse    pulses filling a tenth of a dump, 6 channels, in 5 % of the dumps,
             1-6 sigma mean excess per dump
compact      pulses one dump long and 3 channels wide, 2-6 sigma
carrier      persistent single-channel carriers, 0.5-2 sigma, every dump
wandering    one channel whose strength wanders slowly between 0.8 and 1.6 sigma
============ ==================================================================

A smooth sky line (the 21-cm line, peak 1.2 sigma per dump, FWHM ~14 channels, at
its Doppler-shifted frequency) is added to every dump when the view holds it; it is
not interference: its samples have INR 0 and are marked in the truth's ``/sky``.

Truth file: the layout of :mod:`rfisieve.sim.scans` (``/inr``, ``/kind``,
``/dropped``, ``/products``, ``kinds``) plus ``/sky`` (bool (T, F, P): samples where
the sky line exceeds 10 % of its peak).
"""

import json
import math

import h5py
import numpy as np

from rfisieve.io.scan import atomic_output

__all__ = ["FIELD_KINDS", "field_bandpass", "field_scene", "write_field_scene", "HI_REST_HZ"]

#: Truth codes of the field kinds (own codes, apart from the simulator's 1-6).
FIELD_KINDS = {"satellite": 11, "wideband": 12, "switching": 13, "tdma": 14, "fracpulse": 15,
               "compact": 16, "carrier": 17, "wandering": 18}

#: Rest frequency of the 21-cm hydrogen line, Hz (Lovas' recommended rest
#: frequencies, as in NIST's tables; from memory: 1420.405752 MHz).
HI_REST_HZ = 1420.405752e6

SPEED_OF_LIGHT = 299_792_458.0


def _standing(c, amp, path_m, channel_width, phase):
    """1 + a sin(2 pi c / P + phase) over channels c: a standing wave of relative
    amplitude a whose period P is c / (2 L) for a reflection path of L = ``path_m``
    metres (in channels of ``channel_width`` Hz)."""
    period = SPEED_OF_LIGHT / (2 * float(path_m)) / channel_width
    return 1.0 + float(amp) * np.sin(2 * np.pi * c / period + float(phase))


def field_bandpass(nchan, rng, edge_channels=20.0, edge_drop=50.0, knee_channels=24,
                   shoulder=True, channel_width=62.5e3, standing_wave=None):
    """Relative bandpass of a digitised band with steep anti-aliasing edges.

    Within ``knee_channels`` of each edge the response falls as
    exp(-ln(edge_drop) * s(u) / edge_channels), u the channels beyond the knee
    and s a softened ramp (s(u) = h log(1 + exp(u / h)), h = 1 channel: a sharp
    knee), i.e. by ``edge_drop`` over ``edge_channels`` channels.  In band: a 10 %
    dome, a random slope of up to 4 %, a 2 % standing wave of period c / (2 x 5 m)
    (common practice for a dish-feed reflection; the path is invented) and, with
    ``shoulder``, a 30 % step over about 6 channels at a random place.  ``standing_wave``
    = (a, L, phase) adds a second standing wave of relative amplitude a and period
    c / (2 L) (a reflection path of L metres, e.g. between a large dish's vertex and its
    focus, or along a mismatched cable), at ``phase`` radians.

    Returns float64 (nchan,), peak about 1.
    """
    c = np.arange(nchan, dtype=np.float64)
    x = (c + 0.5) / nchan
    h = 1.0
    def soft(u):
        return h * np.logaddexp(0.0, u / h)
    lo_u = (knee_channels - c)
    hi_u = (c - (nchan - 1 - knee_channels))
    edge = np.exp(-math.log(edge_drop) * (soft(lo_u) + soft(hi_u)) / edge_channels)
    slope = rng.uniform(-0.04, 0.04)
    dome = (0.9 + 0.1 * (1.0 - (2.0 * x - 1.0) ** 2)) * (1.0 + slope * (x - 0.5))
    out = edge * dome * _standing(c, 0.02, 5.0, channel_width, rng.uniform(0, 2 * np.pi))
    if standing_wave is not None:
        out = out * _standing(c, *standing_wave[:2], channel_width, standing_wave[2])
    if shoulder:
        at = rng.uniform(0.55, 0.8) * nchan
        out *= 1.0 - 0.3 / (1.0 + np.exp(-(c - at) / 1.5))
    return out


def _gain(ntime, rng):
    u = np.arange(ntime) / max(1, ntime - 1)
    return rng.uniform(40, 60) * (1.0 + 0.03 * np.sin(2 * np.pi * u / rng.uniform(0.8, 1.5)
                                                     + rng.uniform(0, 2 * np.pi))
                                  + rng.uniform(-0.02, 0.02) * u)


def _skirt(nchan, c0, width, steep=1.0):
    """Spectral profile of a band-limited emitter: flat over ``width`` channels from
    c0 with logistic skirts of ``steep`` channels."""
    c = np.arange(nchan, dtype=np.float64)
    u = np.clip(-(c - c0 + 0.5) / steep, -50, 50)
    v = np.clip((c - c0 - width + 0.5) / steep, -50, 50)
    p = 1.0 / (1.0 + np.exp(u)) / (1.0 + np.exp(v))
    p[p < 1e-3] = 0.0          # no skirt below -30 dB
    return p


def _free_range(rng, used, nchan, width, margin=40):
    """A start channel for an emitter of ``width`` channels away from the edges and
    from the ranges already used."""
    for _ in range(200):
        c0 = int(rng.integers(margin, nchan - margin - width))
        if all(c0 + width + 3 <= a or c0 >= b + 3 for a, b in used):
            used.append((c0, c0 + width))
            return c0
    raise RuntimeError("no free channel range left for an emitter")


def _emitters(kinds, ntime, nchan, rng, used):
    """(code, inr plane (T, F) float32, fraction-of-dump q or 1) per emitter."""
    out = []
    t = np.arange(ntime, dtype=np.float64)
    for kind in kinds:
        code = FIELD_KINDS[kind]
        if kind == "satellite":
            for _ in range(2):
                w = int(rng.integers(36, 44))
                c0 = _free_range(rng, used, nchan, w)
                dur = rng.uniform(1300, 1700)
                mid = rng.uniform(dur / 2 - 200, ntime - dur / 2 + 200)
                peak = rng.uniform(2.0, 4.0)
                env = np.clip(np.sin(np.pi * np.clip((t - mid) / dur + 0.5, 0, 1)), 0, None) ** 2
                out.append((code, (peak * env[:, None] * _skirt(nchan, c0, w, 0.7)[None, :]), 1.0))
        elif kind == "wideband":
            for _ in range(2):
                w = int(rng.integers(20, 30))
                c0 = _free_range(rng, used, nchan, w)
                n = int(rng.integers(600, 900))
                s = int(rng.integers(0, ntime - n))
                p = np.zeros((ntime, nchan))
                p[s:s + n] = rng.uniform(1.0, 2.0) * _skirt(nchan, c0, w, 0.5)
                out.append((code, p, 1.0))
        elif kind == "switching":
            for _ in range(2):
                w = int(rng.integers(10, 30))
                c0 = _free_range(rng, used, nchan, w)
                on = np.zeros(ntime, bool)
                k = int(rng.integers(0, 100))
                while k < ntime:
                    d = int(rng.integers(30, 300))
                    on[k:k + d] = True
                    k += d + int(rng.integers(30, 300))
                p = on[:, None] * rng.uniform(1.0, 2.5) * _skirt(nchan, c0, w, 0.5)[None, :]
                out.append((code, p, 1.0))
        elif kind == "tdma":
            for _ in range(4):
                c0 = _free_range(rng, used, nchan, 2, margin=30)
                on = np.zeros(ntime, bool)
                k = int(rng.integers(0, 300))
                while k < ntime:
                    d = int(rng.integers(150, 250))
                    ph = int(rng.integers(0, 8))
                    frames = ((np.arange(d) + ph) % 8) < 4
                    on[k:k + d] = frames[:max(0, min(d, ntime - k))]
                    k += d + int(rng.integers(200, 600))
                p = np.zeros((ntime, nchan))
                p[:, c0:c0 + 2] = on[:, None] * rng.uniform(1.0, 3.0)
                out.append((code, p, 1.0))
        elif kind == "fracpulse":
            for _ in range(3):
                c0 = _free_range(rng, used, nchan, 6, margin=30)
                hit = rng.random(ntime) < 0.05
                p = np.zeros((ntime, nchan))
                p[:, c0:c0 + 6] = (hit * rng.uniform(1.0, 6.0, ntime))[:, None]
                out.append((code, p, 0.1))
        elif kind == "compact":
            p = np.zeros((ntime, nchan))
            for _ in range(int(ntime * nchan / 20000)):
                ti = int(rng.integers(0, ntime))
                c0 = int(rng.integers(30, nchan - 33))
                p[ti, c0:c0 + 3] = rng.uniform(2.0, 6.0)
            out.append((code, p, 1.0))
        elif kind == "carrier":
            for inr in (0.55, 0.7, 0.85, 1.0, 1.2, 1.5, 2.0, 3.0):
                c0 = _free_range(rng, used, nchan, 1, margin=2)
                p = np.zeros((ntime, nchan))
                p[:, c0] = inr * rng.uniform(0.97, 1.03)
                out.append((code, p, 1.0))
        elif kind == "wandering":
            for _ in range(3):
                c0 = _free_range(rng, used, nchan, 1, margin=30)
                walk = np.cumsum(rng.normal(0, 1, ntime))
                walk = np.convolve(walk, np.ones(101) / 101, mode="same")
                walk = (walk - walk.min()) / max(1e-9, np.ptp(walk))
                p = np.zeros((ntime, nchan))
                p[:, c0] = 0.8 + 0.8 * walk
                out.append((code, p, 1.0))
        else:
            raise ValueError(f"unknown field kind {kind!r}; kinds: {', '.join(FIELD_KINDS)}")
    return out


def field_scene(kinds, seed, ntime=4096, nchan=1024, accumulations=512, channel_width=62.5e3,
                f_center_hz=1420.0e6, sky_line=True, edge_knees=(True, True), inputs=("pier3.a", "pier3.b"),
                second_strength=0.8, edge_carriers=True, standing_wave=None):
    """Draw one field scene in memory.

    Parameters
    ----------
    kinds : sequence of str
        Emitter kinds of :data:`FIELD_KINDS` to place (each places a few emitters).
    seed : int
        Seed of everything random.
    ntime, nchan, accumulations, channel_width : int, int, int, float
        Dumps, channels, N (raw spectra per dump) and channel width in Hz.
    f_center_hz : float
        Centre of the view.
    sky_line : bool
        Add the 21-cm line (peak 1.2 sigma, FWHM 14 channels, Doppler shift drawn
        within +-150 km/s) where the view holds it.
    edge_carriers : bool
        Also put 1-sigma persistent carriers on the knees (kind ``carrier``).
    standing_wave : (float, float), optional
        A second standing wave in each input's bandpass, (amplitude, path in metres)
        (:func:`field_bandpass`); its phases come from a generator of their own, so the
        scene is otherwise the one drawn without it.

    Returns
    -------
    dict with data (T, F, P) float32, freq, inr, kind, sky, products, accumulations,
    channel_width.
    """
    rng = np.random.default_rng(seed)
    n_acc = int(accumulations)
    freq = f_center_hz + (np.arange(nchan) - nchan / 2 + 0.5) * channel_width
    used = [(0, 26), (nchan - 26, nchan)]
    mus = []
    phases = np.random.default_rng([seed, 2]).uniform(0, 2 * np.pi, len(inputs))
    for i, _ in enumerate(inputs):
        wave = None if standing_wave is None else (*standing_wave, phases[i])
        bp = field_bandpass(nchan, rng, channel_width=channel_width, standing_wave=wave)
        mus.append(_gain(ntime, rng)[:, None] * bp[None, :])
    # the sky line
    sky = np.zeros(nchan)
    if sky_line:
        v = rng.uniform(-150e3, 150e3)
        f0 = HI_REST_HZ * (1 - v / SPEED_OF_LIGHT)
        c0 = (f0 - freq[0]) / channel_width
        if 20 < c0 < nchan - 20:
            sig = 14.0 / 2.3548
            sky = 1.2 * np.exp(-0.5 * ((np.arange(nchan) - c0) / sig) ** 2)
            used.append((int(c0 - 3 * sig), int(c0 + 3 * sig)))
    ems = _emitters(kinds, ntime, nchan, rng, used)
    if edge_carriers:
        code = FIELD_KINDS["carrier"]
        for c0 in (int(rng.integers(14, 24)), nchan - 1 - int(rng.integers(14, 24))):
            p = np.zeros((ntime, nchan))
            p[:, c0] = 1.0
            ems.append((code, p, 1.0))
    nprod = len(inputs)
    data = np.empty((ntime, nchan, nprod), np.float32)
    inr = np.zeros((ntime, nchan, nprod), np.float32)
    kind = np.zeros((ntime, nchan, nprod), np.uint8)
    for j, mu in enumerate(mus):
        strength = 1.0 if j == 0 else float(second_strength)
        noise_rms = mu / math.sqrt(n_acc)
        total = np.zeros((ntime, nchan))
        frac_e = np.zeros((ntime, nchan))
        best = np.zeros((ntime, nchan))
        for code, p, q in ems:
            pj = strength * p
            if q < 1:
                frac_e += pj
            else:
                total += pj
            larger = pj > best
            kind[:, :, j][larger & (pj > 0)] = code
            np.maximum(best, pj, out=best)
        inr[:, :, j] = total + frac_e
        mean = mu + (total + strength * sky[None, :]) * noise_rms
        x = rng.gamma(n_acc, 1.0, size=(ntime, nchan))
        has_frac = frac_e > 0
        if has_frac.any():
            q = 0.1
            nq = max(1, int(round(q * n_acc)))
            idx = np.nonzero(has_frac)
            e = frac_e[idx] * noise_rms[idx]
            m = mean[idx]
            # (1 - q) N raw spectra of the clean mean and q N of the pulse's
            part = rng.gamma(n_acc - nq, 1.0, size=e.shape) * m + rng.gamma(nq, 1.0, size=e.shape) * (m + e * n_acc / nq)
            x[idx] = part / m
        data[:, :, j] = (x / n_acc * mean).astype(np.float32)
    skyp = np.repeat(((sky > 0.12)[None, :, None]), ntime, axis=0)
    skyp = np.broadcast_to(skyp, (ntime, nchan, nprod)).copy()
    return {"data": data, "freq": freq, "inr": inr, "kind": kind, "sky": skyp,
            "products": [f"{a}-{a}" for a in inputs], "accumulations": n_acc,
            "channel_width": float(channel_width)}


def write_field_scene(path, truth_path, scene, band="L", integration_time=1.0, start=1.7e9):
    """Write a :func:`field_scene` as a scan file (docs/design.md 3.1 layout) and its truth file."""
    ntime = scene["data"].shape[0]
    chunks = (min(ntime, 128),) + scene["data"].shape[1:]
    with atomic_output(path) as tmp, h5py.File(tmp, "w") as f:
        f.create_dataset("data", data=scene["data"], chunks=chunks)
        f.create_dataset("time", data=start + (np.arange(ntime) + 0.5) * integration_time)
        f.create_dataset("freq", data=scene["freq"])
        f.create_dataset("products", data=np.array(scene["products"], dtype=object), dtype=h5py.string_dtype())
        f.attrs.update({"band": band, "integration_time": float(integration_time),
                        "channel_width": scene["channel_width"], "accumulations": scene["accumulations"],
                        "presum": 1, "voltage": "complex"})
    with atomic_output(truth_path) as tmp, h5py.File(tmp, "w") as f:
        opts = dict(chunks=chunks, compression="gzip", compression_opts=1)
        f.create_dataset("inr", data=scene["inr"], **opts)
        f.create_dataset("kind", data=scene["kind"], **opts)
        f.create_dataset("sky", data=scene["sky"], **opts)
        f.create_dataset("dropped", data=np.zeros(ntime, bool))
        f.create_dataset("products", data=np.array(scene["products"], dtype=object), dtype=h5py.string_dtype())
        f.attrs["kinds"] = json.dumps({str(c): k for k, c in FIELD_KINDS.items()})
        f.attrs["accumulations"] = scene["accumulations"]

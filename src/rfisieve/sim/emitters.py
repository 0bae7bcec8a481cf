"""Interference emitters of the simulator: their parameters, their pattern in a scan,
and the default emitters of each band.

An emitter is a plain dict.  Keys common to every kind:

``kind`` (str, required)
    ``"carrier"``, ``"pulsed"``, ``"burst"``, ``"drifting"``, ``"intermittent"`` or
    ``"noiselike"`` (codes 1-6 of the truth file, :data:`KIND_CODES`).
``inr`` (float > 0, required)
    Per-sample interference-to-noise ratio where the emitter is at full strength: the
    excess mean power it adds to a dump of an auto product, in units of that dump's
    noise rms ``mu / sqrt(N)`` (N = accumulations).  Channels that the emitter only
    partly covers get the covered fraction of it.
``start``, ``stop`` (int, optional)
    Dumps ``[start, stop)`` in which the emitter exists; default the whole scan.
``inputs`` (list of str, optional)
    Inputs it reaches (``"pier1.a"``, ...); default all.
``input_scale`` (dict, optional)
    Input -> factor on ``inr`` (e.g. a weaker sidelobe on one antenna); default 1.
``name``, ``source`` (str, optional)
    Free text: what it stands for and where its frequency comes from.

Frequency keys: a *line* emitter (carrier, drifting, intermittent carrier) takes
``freq_hz`` (split between the two nearest channels with a triangular channel response)
or ``channel`` (all in that channel).  A *band* emitter (pulsed, noiselike,
intermittent noise, burst) takes ``channels`` = ``[first, stop)``, or ``freq_lo_hz`` and
``freq_hi_hz``, or ``freq_hz`` and ``width_hz``, or ``channel`` (one whole channel); a
channel gets the fraction of its width
that the band covers.  A burst covers every channel unless told otherwise.

Kind-specific keys:

carrier
    A constant sinusoid (CW) in the voltage: the dump power is a scaled noncentral
    chi-square with 2N degrees of freedom; makes SK low.
pulsed
    ``duty`` (0 < q < 1, default 0.05): fraction of a hit dump's N raw spectra that carry
    the pulses (a pulse train shorter than a dump); ``period`` (dumps, default 1),
    ``on`` (dumps hit per period, default 1), ``phase`` (dump offset, default 0): the
    dumps ``t`` with ``(t - start - phase) mod period < on`` are hit.  The pulses are
    noise-like at a level ``inr * mu / (q sqrt(N))`` above the base; makes SK high.
burst
    Noise-like power in all (or the given) channels for dumps ``[start, stop)``
    (default one dump); ``spectral_index`` (default 0): INR scales as
    ``(f / f_centre)^index``.
drifting
    A carrier whose frequency moves linearly with time: ``freq_hz`` (or ``channel``) at
    dump ``start`` and ``drift_hz_per_s`` (or ``drift_channels_per_dump``).  Its channel
    response is averaged over each dump (8 sub-steps).
intermittent
    An emitter switching on and off: ``signal`` = ``"carrier"`` (default) or
    ``"noise"``; either ``on_dumps`` = list of ``[a, b)`` dump ranges, or a random
    telegraph with ``on_fraction`` (default 0.3) of the dumps on in runs of mean length
    ``mean_on`` dumps (default 10).
noiselike
    Gaussian noise raising the power of a block of dumps x channels (q = 1): SK stays
    about 1, only the power shows it.
"""

import copy
import json

import numpy as np

KIND_CODES = {"carrier": 1, "pulsed": 2, "burst": 3, "drifting": 4, "intermittent": 5,
              "noiselike": 6}
KIND_NAMES = {code: name for name, code in KIND_CODES.items()}
#: The ``kinds`` attribute of a truth file: JSON object code -> name (0 = clean).
KINDS_JSON = json.dumps({str(code): name for code, name in KIND_NAMES.items()})

_COMMON = {"kind", "inr", "start", "stop", "inputs", "input_scale", "name", "source"}
_FREQ_LINE = {"freq_hz", "channel"}
_FREQ_BAND = {"channel", "channels", "freq_lo_hz", "freq_hi_hz", "freq_hz", "width_hz"}
_ALLOWED = {
    "carrier": _COMMON | _FREQ_LINE,
    "pulsed": _COMMON | _FREQ_BAND | {"duty", "period", "on", "phase"},
    "burst": _COMMON | _FREQ_BAND | {"spectral_index"},
    "drifting": _COMMON | _FREQ_LINE | {"drift_hz_per_s", "drift_channels_per_dump"},
    "intermittent": _COMMON | _FREQ_LINE | _FREQ_BAND
    | {"signal", "on_dumps", "on_fraction", "mean_on"},
    "noiselike": _COMMON | _FREQ_BAND,
}


class Pattern:
    """An emitter rendered on a scan's grid.

    Attributes
    ----------
    kind : str
    mode : {"carrier", "noise", "pulse"}
        How it enters the voltage: a coherent sinusoid, Gaussian noise for the whole
        dump, or Gaussian noise in ``npulse[t]`` of the N raw spectra of dump t.
    inr : ndarray (ntime, nchan) float64
        INR in an input with scale 1 (0 where the emitter is absent).
    npulse : ndarray (ntime,) int or None
    scale : dict input -> float
    delays : dict antenna -> (delay s, delay rate s/s), the geometric delay used for
        the phase of the interference in cross products.
    """

    def __init__(self, kind, mode, inr, scale, delays, npulse=None, spec=None):
        self.kind = kind
        self.code = KIND_CODES[kind]
        self.mode = mode
        self.inr = inr
        self.scale = scale
        self.delays = delays
        self.npulse = npulse
        self.spec = spec
        self._support = None

    def support(self):
        """Indices (t, f) of the samples the emitter reaches."""
        if self._support is None:
            self._support = np.nonzero(self.inr > 0)
        return self._support


def _err(spec, problem):
    return ValueError(f"emitter {spec.get('name') or spec.get('kind')!r}: {problem}")


def _line_position(spec, freq, cw):
    """Fractional channel index of a line emitter."""
    if "channel" in spec:
        return float(spec["channel"])
    if "freq_hz" in spec:
        return (float(spec["freq_hz"]) - freq[0]) / cw
    raise _err(spec, "needs freq_hz or channel")


def _triangle(pos, nchan):
    """Triangular channel response of a line at fractional channel ``pos``."""
    c = np.arange(nchan, dtype=np.float64)
    return np.clip(1.0 - np.abs(c - pos), 0.0, None)


def _band_weights(spec, freq, cw, default_all=False):
    nchan = freq.size
    if "channel" in spec:
        c = int(spec["channel"])
        if not 0 <= c < nchan:
            raise _err(spec, f"channel {c} outside 0..{nchan - 1}")
        w = np.zeros(nchan)
        w[c] = 1.0
        return w
    if "channels" in spec:
        a, b = (int(v) for v in spec["channels"])
        if not 0 <= a < b <= nchan:
            raise _err(spec, f"channels {spec['channels']} outside 0..{nchan}")
        w = np.zeros(nchan)
        w[a:b] = 1.0
        return w
    if "freq_lo_hz" in spec or "freq_hi_hz" in spec:
        lo, hi = float(spec["freq_lo_hz"]), float(spec["freq_hi_hz"])
    elif "freq_hz" in spec and "width_hz" in spec:
        lo = float(spec["freq_hz"]) - float(spec["width_hz"]) / 2
        hi = float(spec["freq_hz"]) + float(spec["width_hz"]) / 2
    elif default_all:
        return np.ones(nchan)
    else:
        raise _err(spec, "needs channels, freq_lo_hz/freq_hi_hz or freq_hz/width_hz")
    if hi <= lo:
        raise _err(spec, "empty frequency range")
    clo, chi = freq - cw / 2, freq + cw / 2
    return np.clip((np.minimum(chi, hi) - np.maximum(clo, lo)) / cw, 0.0, 1.0)


def _telegraph(rng, ntime, on_fraction, mean_on):
    """Random on/off (two-state Markov) sequence with the given on-fraction and mean
    on-run length, started in its stationary state."""
    if not 0.0 < on_fraction < 1.0:
        raise ValueError(f"on_fraction must be in (0, 1), got {on_fraction}")
    p_off = 1.0 / max(float(mean_on), 1.0)                  # on -> off per dump
    p_on = p_off * on_fraction / (1.0 - on_fraction)        # off -> on per dump
    p_on = min(p_on, 1.0)
    state = rng.random() < on_fraction
    u = rng.random(ntime)
    out = np.empty(ntime, dtype=bool)
    for t in range(ntime):
        out[t] = state
        state = (u[t] >= p_off) if state else (u[t] < p_on)
    return out


def render(spec, freq, cw, time, inputs, accumulations, rng):
    """Render one emitter dict on the grid of a scan; see the module docstring.

    Returns
    -------
    Pattern
    """
    if not isinstance(spec, dict) or "kind" not in spec:
        raise ValueError(f"emitter must be a dict with a 'kind', got {spec!r}")
    kind = spec["kind"]
    if kind not in KIND_CODES:
        raise _err(spec, f"unknown kind {kind!r}; kinds: {', '.join(KIND_CODES)}")
    unknown = set(spec) - _ALLOWED[kind]
    if unknown:
        raise _err(spec, f"unknown keys for kind {kind}: {', '.join(sorted(unknown))}")
    if "inr" not in spec or not float(spec["inr"]) > 0:
        raise _err(spec, "needs inr > 0")
    inr = float(spec["inr"])
    ntime, nchan = time.size, freq.size
    start = int(spec.get("start", 0))
    stop = int(spec.get("stop", start + 1 if kind == "burst" else ntime))
    if not 0 <= start < stop <= ntime:
        raise _err(spec, f"dumps [{start}, {stop}) outside 0..{ntime}")
    alive = np.zeros(ntime, dtype=bool)
    alive[start:stop] = True
    npulse = None
    mode = "noise"

    if kind in ("carrier", "drifting") or (kind == "intermittent"
                                           and spec.get("signal", "carrier") == "carrier"):
        mode = "carrier"
        pos0 = _line_position(spec, freq, cw)
        if kind == "drifting":
            if "drift_channels_per_dump" in spec:
                rate = float(spec["drift_channels_per_dump"])
            elif "drift_hz_per_s" in spec:
                dt = float(time[1] - time[0]) if ntime > 1 else 1.0
                rate = float(spec["drift_hz_per_s"]) * dt / cw
            else:
                raise _err(spec, "needs drift_hz_per_s or drift_channels_per_dump")
            sub = (np.arange(8) + 0.5) / 8.0 - 0.5
            t_rel = np.arange(ntime)[:, None] - start + sub[None, :]      # (T, 8)
            pos = pos0 + rate * t_rel
            chan = np.arange(nchan, dtype=np.float64)
            inr_tf = np.zeros((ntime, nchan))
            for j in range(sub.size):
                inr_tf += np.clip(1.0 - np.abs(chan[None, :] - pos[:, j:j + 1]), 0.0, None)
            inr_tf /= sub.size
        else:
            w = _triangle(pos0, nchan)
            inr_tf = np.zeros((ntime, nchan)) + w[None, :]
    else:
        w = _band_weights(spec, freq, cw, default_all=(kind == "burst"))
        if kind == "burst" and float(spec.get("spectral_index", 0.0)) != 0.0:
            fc = 0.5 * (freq[0] + freq[-1])
            w = w * (freq / fc) ** float(spec["spectral_index"])
        inr_tf = np.zeros((ntime, nchan)) + w[None, :]
        if kind == "pulsed":
            mode = "pulse"
            duty = float(spec.get("duty", 0.05))
            if not 0.0 < duty < 1.0:
                raise _err(spec, f"duty must be in (0, 1), got {duty}")
            period = int(spec.get("period", 1))
            on = int(spec.get("on", 1))
            phase = int(spec.get("phase", 0))
            if period < 1 or on < 1:
                raise _err(spec, "period and on must be >= 1")
            hit = ((np.arange(ntime) - start - phase) % period) < on
            alive &= hit
            npulse = np.where(alive, max(1, int(round(duty * accumulations))), 0)

    if kind == "intermittent":
        if "on_dumps" in spec:
            on_mask = np.zeros(ntime, dtype=bool)
            for a, b in spec["on_dumps"]:
                on_mask[int(a):int(b)] = True
        else:
            on_mask = _telegraph(rng, ntime, float(spec.get("on_fraction", 0.3)),
                                 float(spec.get("mean_on", 10)))
        alive &= on_mask

    inr_tf *= inr
    inr_tf[~alive] = 0.0
    if not np.any(inr_tf > 0):
        raise _err(spec, "does not reach any sample of the scan (check its frequency "
                         "and dumps)")
    reach = spec.get("inputs")
    unknown_inputs = set(reach or ()) - set(inputs)
    if unknown_inputs:
        raise _err(spec, f"unknown inputs {sorted(unknown_inputs)}; scan inputs: {inputs}")
    factors = spec.get("input_scale", {}) or {}
    scale = {}
    for name in inputs:
        if reach is not None and name not in reach:
            scale[name] = 0.0
        else:
            scale[name] = float(factors.get(name, 1.0))
    antennas = sorted({name[:-1] for name in inputs})
    delays = {ant: (rng.uniform(-300e-9, 300e-9), rng.uniform(-2e-12, 2e-12))
              for ant in antennas}
    return Pattern(kind, mode, inr_tf, scale, delays, npulse=npulse, spec=copy.deepcopy(spec))


# --------------------------------------------------------------------------------------
# Default emitters: where real ones plausibly are.  Frequencies name their source;
# the strengths, duty cycles and timings are invented for the demo.
# --------------------------------------------------------------------------------------

def _in_view(spec, freq, cw):
    lo, hi = freq[0] - cw / 2, freq[-1] + cw / 2
    if "freq_lo_hz" in spec:
        return spec["freq_hi_hz"] > lo and spec["freq_lo_hz"] < hi
    if "width_hz" in spec:
        return (spec["freq_hz"] + spec["width_hz"] / 2 > lo
                and spec["freq_hz"] - spec["width_hz"] / 2 < hi)
    if "freq_hz" in spec:
        return lo <= spec["freq_hz"] < hi
    return True


def _bursts(rng, ntime, count, inr):
    out = []
    for t in sorted(rng.choice(max(ntime - 4, 1), size=count, replace=False)):
        length = int(rng.integers(1, 4))
        out.append({"kind": "burst", "name": "broadband discharge (invented: electric "
                    "fence)", "inr": float(inr), "start": int(t),
                    "stop": int(min(t + length, ntime)), "spectral_index": -1.0})
    return out


def _span(rng, ntime, lo, hi):
    """Random dump range covering a fraction in [lo, hi] of the scan."""
    n = max(1, int(round(rng.uniform(lo, hi) * ntime)))
    a = int(rng.integers(0, max(ntime - n, 0) + 1))
    return a, min(a + n, ntime)


def default_emitters(band, freq, channel_width, time, rng):
    """The default emitters of a band that fall in the scan's frequency range.

    Parameters
    ----------
    band : str
    freq : ndarray, channel centres (Hz)
    channel_width : float, Hz
    time : ndarray, dump centres (s)
    rng : numpy.random.Generator
        Draws the invented timings (burst dumps, satellite passes).

    Returns
    -------
    list of dict
        Emitter dicts in the form documented in this module.
    """
    ntime = time.size
    dt = float(time[1] - time[0]) if ntime > 1 else 1.0
    out = []
    if band == "L":
        a, b = _span(rng, ntime, 0.3, 0.6)
        out += [
            {"kind": "carrier", "name": "GPS L1", "freq_hz": 1575.42e6, "inr": 40.0,
             "source": "IS-GPS-200, 3.3.1.1 (L1 centre 1575.42 MHz); modelled as a "
                       "carrier although the real signal is spread over ~2 MHz"},
            {"kind": "carrier", "name": "GPS L2", "freq_hz": 1227.60e6, "inr": 10.0,
             "source": "IS-GPS-200, 3.3.1.1 (L2 centre 1227.60 MHz)"},
            {"kind": "noiselike", "name": "GPS L5 / Galileo E5a satellite pass",
             "freq_hz": 1176.45e6, "width_hz": 20.46e6, "inr": 3.0, "start": a, "stop": b,
             "source": "IS-GPS-705 (L5 centre 1176.45 MHz); width from memory"},
            {"kind": "noiselike", "name": "GLONASS L1 (FDMA)", "freq_lo_hz": 1597.55e6,
             "freq_hi_hz": 1605.89e6, "inr": 5.0,
             "source": "GLONASS ICD ed. 5.1, L1 channels 1602 + k 0.5625 MHz (from memory)"},
            {"kind": "pulsed", "name": "SSR / ADS-B replies", "freq_hz": 1090e6,
             "width_hz": 2.6e6, "inr": 12.0, "duty": 0.01,
             "source": "ICAO Annex 10 Vol IV, 1090 MHz replies (from memory)"},
            {"kind": "pulsed", "name": "L-band surveillance radar", "freq_hz": 1280e6,
             "width_hz": 2.5e6, "inr": 60.0, "duty": 0.02,
             "period": max(1, int(round(12.0 / dt))), "on": 1,
             "source": "ITU Radio Regulations Art. 5, radiolocation 1215-1400 MHz (from "
                       "memory); 12 s antenna rotation invented"},
        ]
        for f_mhz in (1011.0, 1150.0, 1196.0):
            out.append({"kind": "pulsed", "name": f"DME ground beacon {f_mhz:.0f} MHz",
                        "freq_hz": f_mhz * 1e6, "width_hz": 1.0e6, "inr": 8.0,
                        "duty": 0.03,
                        "source": "ICAO Annex 10 Vol I, DME replies 962-1213 MHz on a 1 "
                                  "MHz raster (from memory)"})
        out += [
            {"kind": "intermittent", "name": "site telemetry link (invented)",
             "freq_hz": 1352.3e6, "inr": 20.0, "signal": "carrier", "on_fraction": 0.3,
             "mean_on": max(2.0, ntime / 40)},
            {"kind": "drifting", "name": "free-running oscillator in site electronics "
             "(invented)", "freq_hz": 1463.0e6, "inr": 25.0,
             # 16 channels over 80 % of the scan (about 12 kHz/s at the defaults)
             "drift_hz_per_s": 16 * channel_width / (0.8 * ntime * dt),
             "start": int(0.1 * ntime), "stop": max(int(0.9 * ntime), int(0.1 * ntime) + 1)},
        ]
        out += _bursts(rng, ntime, 2, 8.0)
    elif band == "P":
        a, b = _span(rng, ntime, 0.2, 0.5)
        out += [
            {"kind": "noiselike", "name": "TETRA downlink (emergency services)",
             "freq_lo_hz": 390e6, "freq_hi_hz": 395e6, "inr": 12.0,
             "source": "ETSI EN 300 392 / ECC decision (04)06: TETRA for public safety "
                       "380-385 / 390-395 MHz (from memory)"},
            {"kind": "intermittent", "name": "TETRA handset uplink", "freq_hz": 382.4e6,
             "width_hz": 25e3, "signal": "noise", "inr": 15.0, "on_fraction": 0.2,
             "mean_on": max(2.0, ntime / 100),
             "source": "ETSI EN 300 392, uplink 380-385 MHz, 25 kHz carriers (from memory)"},
            {"kind": "pulsed", "name": "distress beacon burst (406 MHz)", "freq_hz": 406.04e6,
             "width_hz": 0.1e6, "inr": 20.0, "duty": 0.01,
             "period": max(1, int(round(50.0 / dt))), "on": 1,
             "source": "COSPAS-SARSAT C/S T.001, 406.0-406.1 MHz beacons, burst every "
                       "50 s (from memory)"},
            {"kind": "intermittent", "name": "433 MHz short-range devices", "freq_hz": 433.92e6,
             "signal": "carrier", "inr": 10.0, "on_fraction": 0.1, "mean_on": 2.0,
             "source": "ITU Radio Regulations No. 5.138 and ERC Rec. 70-03, ISM / SRD "
                       "433.05-434.79 MHz (from memory)"},
            {"kind": "noiselike", "name": "PMR446 handhelds", "freq_lo_hz": 446.0e6,
             "freq_hi_hz": 446.2e6, "inr": 8.0, "start": a, "stop": b,
             "source": "ECC decision (15)05, PMR446 446.0-446.2 MHz (from memory)"},
            {"kind": "noiselike", "name": "DVB-T multiplex (TV channel 21)",
             "freq_lo_hz": 470e6, "freq_hi_hz": 478e6, "inr": 25.0,
             "source": "ITU Region 1 UHF TV raster, 8 MHz channels from 470 MHz (from "
                       "memory)"},
            {"kind": "carrier", "name": "local-oscillator leak of a site receiver "
             "(invented)", "freq_hz": 350.0e6, "inr": 30.0},
            {"kind": "drifting", "name": "faulty switching supply harmonic (invented)",
             "freq_hz": 322.0e6, "inr": 15.0,
             # drifts 10 channels downwards over the whole scan
             "drift_hz_per_s": -10 * channel_width / (ntime * dt)},
        ]
        out += _bursts(rng, ntime, 2, 10.0)
    elif band == "C":
        out += [
            {"kind": "pulsed", "name": "radio altimeters (aircraft overhead)",
             "freq_lo_hz": 4250e6, "freq_hi_hz": 4350e6, "inr": 10.0, "duty": 0.02,
             "source": "ITU Radio Regulations Art. 5, aeronautical radionavigation "
                       "4200-4400 MHz (radio altimeters; from memory)"},
            {"kind": "intermittent", "name": "Wi-Fi (5 GHz, channel 36)", "freq_hz": 5180e6,
             "width_hz": 20e6, "signal": "noise", "inr": 10.0, "on_fraction": 0.3,
             "mean_on": 3.0,
             "source": "IEEE 802.11, 5 GHz channel 36 centre 5180 MHz; ECC decision "
                       "(04)08, 5150-5350 MHz (from memory)"},
            {"kind": "pulsed", "name": "C-band weather radar", "freq_hz": 5625e6,
             "width_hz": 2.0e6, "inr": 50.0, "duty": 0.02,
             "period": max(1, int(round(6.0 / dt))),
             "source": "ITU RR Art. 5, meteorological radars in 5600-5650 MHz (No. 5.452; "
                       "from memory); 6 s rotation invented"},
            {"kind": "noiselike", "name": "5.8 GHz links (ISM)", "freq_lo_hz": 5725e6,
             "freq_hi_hz": 5745e6, "inr": 8.0,
             "source": "ITU Radio Regulations No. 5.150, ISM band 5725-5875 MHz (from memory)"},
            {"kind": "carrier", "name": "satellite telemetry beacon (invented)",
             "freq_hz": 4510.5e6, "inr": 20.0},
        ]
        out += _bursts(rng, ntime, 2, 8.0)
    kept = [spec for spec in out if _in_view(spec, freq, channel_width)]
    return kept

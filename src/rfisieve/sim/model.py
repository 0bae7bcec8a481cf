"""Instrument model of the simulated Quillmoor Radio Observatory (QRO).

The Quillmoor Radio Observatory is fictional; its bands are physical ranges:

==== ================= ==========================================
band range (MHz)       default view of a scan (nchan channels)
==== ================= ==========================================
P    300 - 500         310 - 490 MHz
L    950 - 1750        1000 - 1640 MHz
C    4000 - 6000       4200 - 5800 MHz
==== ================= ==========================================

(Receivers of the demo observatory's own choosing: a P-band receiver below the TV
bands, the L band that outside checks use, and a C-band receiver around the 5 GHz
continuum and formaldehyde work.)

The clean mean power of input ``i`` (arbitrary "counts") in dump ``t`` and channel
``f`` is

    mu_i(t, f) = g_i(t) * B_i(f) * (T_sys + T_sky(t, f))

with ``g_i`` the receiver gain (counts per K, with a slow multiplicative drift),
``B_i`` the bandpass (smooth roll-off and slope, optionally with standing-wave ripple)
and ``T_sky`` the Galactic synchrotron foreground, which drifts slowly as the sky
turns (an additive term before the gain, so it is multiplied by the bandpass too).
"""

import math

import numpy as np

#: Band ranges in Hz (invented observatory, physical bands; see the module docstring).
BANDS = {
    "P": (300e6, 500e6),
    "L": (950e6, 1750e6),
    "C": (4000e6, 6000e6),
}

#: Frequency range that a scan of a band covers by default, Hz.  The default channel
#: width is this span over the scan's number of channels.
DEFAULT_VIEW = {
    "P": (310e6, 490e6),
    "L": (1000e6, 1640e6),
    "C": (4200e6, 5800e6),
}

#: Receiver + spillover system temperature per band, K (invented, of a typical size:
#: common practice puts cooled L- and C-band receivers at 15-30 K; an uncooled P-band
#: receiver is warmer).
TSYS_K = {"P": 45.0, "L": 18.0, "C": 25.0}

#: Cold-sky brightness at 408 MHz, K, and the synchrotron spectral index
#: (T ~ f^beta); both from memory (all-sky 408 MHz survey: ~20 K away from the
#: Galactic plane; beta ~ -2.6 between 0.4 and 3 GHz).
T408_K = 20.0
SYNCHROTRON_INDEX = -2.6

#: Standing-wave ripple period, Hz: c / (2 L) for a reflection path of L = 5 m
#: between dish and feed (common practice; L is invented for QRO).
RIPPLE_PERIOD_HZ = 299_792_458.0 / (2 * 5.0)

SPEED_OF_LIGHT = 299_792_458.0


def check_band(band):
    """Return ``band`` if it is a known band name, else raise ``ValueError``."""
    if band not in BANDS:
        raise ValueError(f"unknown band {band!r}; known bands: {', '.join(BANDS)}")
    return band


def frequency_grid(band, nchan, channel_width=None, f_start_hz=None):
    """Channel centres (Hz) and channel width of a scan.

    Parameters
    ----------
    band : str
        Band name, one of :data:`BANDS`.
    nchan : int
        Number of channels.
    channel_width : float, optional
        Channel width in Hz; default: the band's :data:`DEFAULT_VIEW` span / nchan.
    f_start_hz : float, optional
        Centre of channel 0, Hz; default: the low edge of the default view plus half a
        channel.

    Returns
    -------
    freq : ndarray of float64, shape (nchan,)
    channel_width : float

    Raises
    ------
    ValueError
        If the channels do not lie inside the band.
    """
    check_band(band)
    lo, hi = DEFAULT_VIEW[band]
    if channel_width is None:
        channel_width = (hi - lo) / nchan
    channel_width = float(channel_width)
    if channel_width <= 0:
        raise ValueError(f"channel_width must be positive, got {channel_width}")
    if f_start_hz is None:
        f_start_hz = lo + channel_width / 2
    freq = float(f_start_hz) + channel_width * np.arange(nchan, dtype=np.float64)
    blo, bhi = BANDS[band]
    edge_lo = freq[0] - channel_width / 2
    edge_hi = freq[-1] + channel_width / 2
    tol = 1e-6 * channel_width
    if edge_lo < blo - tol or edge_hi > bhi + tol:
        raise ValueError(
            f"channels {edge_lo / 1e6:.3f}-{edge_hi / 1e6:.3f} MHz fall outside band {band} "
            f"({blo / 1e6:.0f}-{bhi / 1e6:.0f} MHz); lower nchan/channel_width or move f_start_hz")
    return freq, channel_width


def bandpass(freq, band, rng, ripple=True):
    """Relative bandpass B(f) of one input (dimensionless, peak about 1).

    Smooth part: logistic roll-offs 2 % of the band inside each band edge, a parabolic
    dome and a random slope of up to +/-5 %.  Ripple: a 3 % standing wave of period
    :data:`RIPPLE_PERIOD_HZ` and a 1 % wave of an eight times shorter period (a longer
    cable reflection), each with a random phase.  ``rng`` draws the random parts.
    """
    blo, bhi = BANDS[band]
    x = (freq - blo) / (bhi - blo)
    slope = rng.uniform(-0.05, 0.05)
    smooth = (0.85 + 0.15 * (1.0 - (2.0 * x - 1.0) ** 2)) * (1.0 + slope * (x - 0.5))
    roll = 1.0 / (1.0 + np.exp(-(x - 0.02) / 0.006)) / (1.0 + np.exp((x - 0.98) / 0.006))
    out = smooth * (0.05 + 0.95 * roll)
    phases = rng.uniform(0.0, 2.0 * np.pi, size=2)
    if ripple:
        out = out * (1.0 + 0.03 * np.sin(2.0 * np.pi * freq / RIPPLE_PERIOD_HZ + phases[0])
                     + 0.01 * np.sin(2.0 * np.pi * freq * 8.0 / RIPPLE_PERIOD_HZ + phases[1]))
    return out


def gain(time, rng, drift=True):
    """Receiver gain g(t), counts per K.

    A nominal gain drawn in [40, 60] counts/K; with ``drift`` a slow multiplicative
    drift: a 2 % sinusoid of period 1.3 scan lengths plus a linear trend of up to
    +/-1.5 % over the scan.
    """
    g0 = rng.uniform(40.0, 60.0)
    phase = rng.uniform(0.0, 2.0 * np.pi)
    trend = rng.uniform(-0.015, 0.015)
    if not drift:
        return np.full(time.shape, g0)
    span = max(float(time[-1] - time[0]), 1e-9)
    u = (time - time[0]) / span
    return g0 * (1.0 + 0.02 * np.sin(2.0 * np.pi * u / 1.3 + phase) + trend * u)


def sky_temperature(time, freq, rng, drift=True):
    """Galactic foreground T_sky(t, f), K, shape (ntime, nchan).

    ``T408 (f / 408 MHz)^beta`` times a slow factor: with ``drift`` a linear rise or
    fall of up to 40 % over the scan plus a 5 % sinusoid (the sky turning through the
    beam); otherwise constant.
    """
    spectrum = T408_K * (freq / 408e6) ** SYNCHROTRON_INDEX
    rise = rng.uniform(-0.4, 0.4)
    phase = rng.uniform(0.0, 2.0 * np.pi)
    if drift:
        span = max(float(time[-1] - time[0]), 1e-9)
        u = (time - time[0]) / span
        factor = 1.0 + 0.5 * abs(rise) + rise * (u - 0.5) + 0.05 * np.sin(2 * np.pi * u + phase)
    else:
        factor = np.ones(time.shape)
    return factor[:, None] * spectrum[None, :]


def clean_means(band, time, freq, inputs, rng, *, ripple=True, gain_drift=True,
                sky_drift=True):
    """Clean mean power mu_i(t, f) of every input.

    Returns
    -------
    dict
        input name -> float64 array (ntime, nchan); all values positive.
    """
    tsys = TSYS_K[band]
    tsky = sky_temperature(time, freq, rng, drift=sky_drift)
    out = {}
    for name in inputs:
        g = gain(time, rng, drift=gain_drift)
        b = bandpass(freq, band, rng, ripple=ripple)
        out[name] = g[:, None] * b[None, :] * (tsys + tsky)
    return out


def parse_time(value):
    """Seconds since 1970-01-01 UTC from a number or an ISO 8601 string."""
    if isinstance(value, (int, float, np.floating, np.integer)):
        return float(value)
    import datetime as _dt
    text = str(value).strip()
    if text.endswith("Z"):
        text = text[:-1] + "+00:00"
    stamp = _dt.datetime.fromisoformat(text)
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=_dt.timezone.utc)
    return stamp.timestamp()


def time_grid(start_time, ntime, integration_time):
    """Dump centres, seconds since 1970 UTC: start + (i + 1/2) * integration_time."""
    t0 = parse_time(start_time)
    return t0 + (np.arange(ntime, dtype=np.float64) + 0.5) * float(integration_time)


def scan_name(start_time, band, prefix="qro"):
    """Scan name like ``qro_20261201_2105_L`` from the start time (UTC, minutes)."""
    import datetime as _dt
    stamp = _dt.datetime.fromtimestamp(math.floor(parse_time(start_time)), tz=_dt.timezone.utc)
    return f"{prefix}_{stamp:%Y%m%d_%H%M}_{band}"

"""Simulated scans of the fictional Quillmoor Radio Observatory, with a truth file each.

The simulator feeds the demo, the end-to-end tests and the quality benchmark.  It
writes scan files in the layout of docs/design.md 3.1 and, beside them, truth files that
say which samples carry interference, how strong it is and of which kind.

Noise statistics are exact at dump level: a dump's mean power over N = accumulations
raw spectra of complex-voltage noise is Gamma(N, mu / N) (radiometer equation: relative
rms 1 / sqrt(N); Wilson, Rohlfs & Huettemeister, Tools of Radio Astronomy).  Clean dumps
are drawn from that Gamma distribution directly.  Interference enters at the voltage
level (carriers, pulses, noise-like emitters; see :mod:`rfisieve.sim.draw` for the
exact draws and the few documented approximations, :mod:`rfisieve.sim.emitters`
for the emitter parameters and :mod:`rfisieve.sim.model` for the instrument).
Scans that record ``/s2`` are simulated raw spectrum by raw spectrum (with a modest
number of accumulations), so that S1 and S2 are jointly right.

Truth file ``<scan>.truth.h5`` (the contract with the engineers who score masks):

============ ====================== ===============================================
path         type, shape            meaning
============ ====================== ===============================================
``/inr``     float32 (T, F, P)      interference-to-noise ratio per sample: excess
                                    mean power from interference over the dump's
                                    noise rms ``mu / sqrt(N)``; 0 where clean.  For a
                                    cross product a-b: the interference term's
                                    amplitude over ``sqrt(mu_a mu_b / N)``, i.e.
                                    ``sqrt(inr_a inr_b)`` per emitter.
``/kind``    uint8 (T, F, P)        0 = clean, else the code of the kind with the
                                    largest INR in the sample (attribute ``kinds``)
``/dropped`` bool (T,)              dumps written as 0 or NaN (no data)
``/mu``      float32 (T, F, P)      clean mean power (autos); ``sqrt(mu_a mu_b)``
                                    for crosses (extra, for scoring by noise units)
``/products`` UTF-8 (P,)            product names, as in the scan
============ ====================== ===============================================

Root attributes: ``scan`` (scan name), ``seed``, ``kinds`` (JSON object code -> name:
1 carrier, 2 pulsed, 3 burst, 4 drifting, 5 intermittent, 6 noiselike),
``accumulations``, ``emitters`` (JSON list of the emitter dicts used).  Dropped dumps
carry no interference in ``/inr`` and ``/kind`` (their data is gone); upstream flags
(``/flags`` in the scan) are not interference and are not in the truth.
"""

import argparse
import json
import math
import textwrap
import time as _time
from pathlib import Path

import h5py
import numpy as np

from rfisieve import __version__
from rfisieve.io.scan import atomic_output
from rfisieve.sim.draw import Group, draw_dumps, draw_raw
from rfisieve.sim.emitters import (KIND_CODES, KIND_NAMES, KINDS_JSON,
                                        default_emitters, render)
from rfisieve.sim.inject import inject
from rfisieve.sim.model import (BANDS, check_band, clean_means, frequency_grid,
                                     parse_time, scan_name, time_grid)
from rfisieve.commands import add_command

__all__ = ["simulate_scan", "simulate_night", "inject", "register_cli", "KIND_CODES",
           "OBSERVATORY", "DEFAULT_START"]

OBSERVATORY = "Quillmoor Radio Observatory"
DEFAULT_START = "2026-12-01T21:05:00Z"
_STREAMS = ("model", "emitters", "noise", "interference", "dropped", "flags")


# --------------------------------------------------------------------------------------
# writing
# --------------------------------------------------------------------------------------

def _write_atomic(path, fill):
    """Write an HDF5 file through ``fill(h5file)`` under a temporary name in the same
    directory, then rename it to ``path``; nothing is left behind on failure."""
    with atomic_output(path) as tmp, h5py.File(tmp, "w") as f:
        fill(f)


def _strings(values):
    return np.array(list(values), dtype=object)


# --------------------------------------------------------------------------------------
# one scan
# --------------------------------------------------------------------------------------

def _products(antennas, feeds, cross):
    inputs = [f"{a}.{f}" for a in antennas for f in feeds]
    products = [(i, i) for i in inputs]
    if cross:
        for f in feeds:
            for x in range(len(antennas)):
                for y in range(x + 1, len(antennas)):
                    products.append((f"{antennas[x]}.{f}", f"{antennas[y]}.{f}"))
    return inputs, products


def _dropped_dumps(rng, ntime, fraction):
    """Runs of 1-8 dumps until ``fraction`` of the dumps is dropped; 0/NaN per run."""
    dropped = np.zeros(ntime, dtype=bool)
    nan_fill = np.zeros(ntime, dtype=bool)
    target = int(round(fraction * ntime))
    if fraction > 0:
        target = max(target, 1)
    run = 0
    while dropped.sum() < target:
        length = int(rng.integers(1, 9))
        length = min(length, target - int(dropped.sum()))
        start = int(rng.integers(0, ntime - length + 1))
        new = ~dropped[start:start + length]
        dropped[start:start + length] = True
        nan_fill[start:start + length] |= new & (run % 2 == 1)
        run += 1
    return dropped, nan_fill


def _upstream_flags(rng, shape, fraction):
    """Upstream flags: band-edge channels (half the budget) and random blocks."""
    ntime, nchan = shape[:2]
    flags = np.zeros(shape, dtype=np.uint8)
    if fraction <= 0:
        return flags
    edge = max(1, int(round(fraction * nchan / 4)))
    flags[:, :edge] = 1
    flags[:, nchan - edge:] = 1
    target = fraction * flags.size
    for _ in range(10_000):
        if flags.sum() >= target:
            break
        dt = int(rng.integers(4, 33))
        dc = int(rng.integers(2, 9))
        t0 = int(rng.integers(0, max(ntime - dt, 0) + 1))
        c0 = int(rng.integers(0, max(nchan - dc, 0) + 1))
        prods = rng.random(shape[2]) < 0.5
        if not prods.any():
            prods[rng.integers(0, shape[2])] = True
        flags[t0:t0 + dt, c0:c0 + dc, prods] = 1
    return flags


def simulate_scan(path, truth_path=None, *, band="L", ntime=512, nchan=256,
                  antennas=("pier1", "pier2"), feeds=("a", "b"), cross=False,
                  accumulations=1024, integration_time=2.0, channel_width=None,
                  f_start_hz=None, start_time=DEFAULT_START, emitters="default",
                  extra_emitters=(), ripple=True, gain_drift=True, sky_drift=True,
                  dropped_fraction=0.0, upstream_flag_fraction=0.0, with_s2=False,
                  seed=0):
    """Simulate one scan of the Quillmoor Radio Observatory and write it (and its truth).

    Parameters
    ----------
    path : path-like
        Scan file to write (layout of docs/design.md 3.1); the scan name is its stem.
    truth_path : path-like, optional
        Truth file to write (layout in the module docstring); none if omitted.
    band : {"P", "L", "C"}
        Receiver band: 300-500, 950-1750 or 4000-6000 MHz.
    ntime, nchan : int
        Dumps and channels.
    antennas : sequence of str
        Antenna names (the demo observatory names its antennas after the pier they
        stand on: ``pier1`` .. ``pier8``).
    feeds : sequence of str
        Feeds (polarizations) of each antenna (``a``, ``b``); inputs are
        ``<antenna>.<feed>``, e.g. ``pier3.a``, and an auto product ``pier3.a-pier3.a``.
    cross : bool
        Also write same-feed cross products ``pier1.a-pier2.a``; /data is then complex64
        (autos real-valued inside it), else float32 with autos only.
    accumulations : int
        N, raw spectra averaged into a dump: the relative noise is 1/sqrt(N).  The
        simulator does not tie it to ``channel_width * integration_time``.
    integration_time : float
        Dump length, s (the /time step).
    channel_width, f_start_hz : float, optional
        Channel width and centre of channel 0, Hz; default the band's default view
        (P 310-490, L 1000-1640, C 4200-5800 MHz) split into ``nchan`` channels.
    start_time : float or str
        Start of the first dump: seconds since 1970 UTC or an ISO 8601 string.
    emitters : "default" or list of dict
        ``"default"``: the band's plausible emitters (GNSS, aviation, mobile, TV ...,
        see :func:`rfisieve.sim.emitters.default_emitters`) that fall in the scan's
        range; a list of emitter dicts (documented in
        :mod:`rfisieve.sim.emitters`); ``[]`` for a clean scan.
    extra_emitters : list of dict
        Appended to ``emitters``.
    ripple, gain_drift, sky_drift : bool
        Standing-wave bandpass ripple, slow multiplicative gain drift, slow additive
        sky drift.
    dropped_fraction : float
        Fraction of dumps written as 0 or NaN (runs of 1-8 dumps); in ``/dropped``.
    upstream_flag_fraction : float
        If > 0, write ``/flags`` (uint8) with about this fraction of samples flagged
        (band-edge channels and random blocks).
    with_s2 : bool
        Record ``/s2`` (sum of squared raw powers); the scan is then simulated raw
        spectrum by raw spectrum, so keep ``accumulations`` modest (64-256).  Needs
        ``cross=False``.
    seed : int
        Seed of every random draw; the same seed gives the same files.

    Returns
    -------
    dict
        Summary: scan, path, truth_path, band, shape, dtype, products, start/stop
        time, accumulations, emitters (kind, name), samples per kind,
        interfered_fraction, dropped_dumps, upstream_flagged_fraction, s2, seed.
    """
    check_band(band)
    ntime, nchan, accumulations = int(ntime), int(nchan), int(accumulations)
    if ntime < 2 or nchan < 2:
        raise ValueError("ntime and nchan must be at least 2")
    antennas, feeds = tuple(antennas), tuple(feeds)
    if not antennas or not feeds:
        raise ValueError("need at least one antenna and one feed")
    if len(set(antennas)) != len(antennas) or len(set(feeds)) != len(feeds):
        raise ValueError("antenna and feed names must be unique")
    if cross and len(antennas) < 2:
        raise ValueError("cross products need at least two antennas")
    if with_s2 and cross:
        raise ValueError("with_s2 needs cross=False (S2 is defined for auto products)")
    k = len(antennas) if cross else 1
    if accumulations < 2 * (k + 1) + 1:
        raise ValueError(f"accumulations must be at least {2 * (k + 1) + 1}")
    if with_s2 and accumulations > 4096:
        raise ValueError("with_s2 simulates every raw spectrum: keep accumulations <= 4096")
    if not 0.0 <= dropped_fraction <= 0.5:
        raise ValueError("dropped_fraction must be in [0, 0.5]")
    if not 0.0 <= upstream_flag_fraction <= 0.5:
        raise ValueError("upstream_flag_fraction must be in [0, 0.5]")
    if not integration_time > 0:
        raise ValueError("integration_time must be positive")

    path = Path(path)
    name = path.name[:-3] if path.name.endswith(".h5") else path.stem
    streams = dict(zip(_STREAMS, (np.random.default_rng(s) for s in
                                  np.random.SeedSequence(int(seed)).spawn(len(_STREAMS)))))
    freq, channel_width = frequency_grid(band, nchan, channel_width, f_start_hz)
    times = time_grid(start_time, ntime, integration_time)
    inputs, products = _products(antennas, feeds, cross)
    nprod = len(products)
    mu = clean_means(band, times, freq, inputs, streams["model"], ripple=ripple,
                     gain_drift=gain_drift, sky_drift=sky_drift)

    if isinstance(emitters, str):
        if emitters != "default":
            raise ValueError(f"emitters must be 'default' or a list, got {emitters!r}")
        specs = default_emitters(band, freq, channel_width, times, streams["emitters"])
    else:
        specs = list(emitters)
    specs = specs + list(extra_emitters)
    patterns = [render(spec, freq, channel_width, times, inputs, accumulations,
                       streams["emitters"]) for spec in specs]

    # interference state per group, then the draws
    groups = ([[f"{a}.{f}" for a in antennas] for f in feeds] if cross
              else [[i] for i in inputs])
    index = {p: j for j, p in enumerate(products)}
    dtype = np.complex64 if cross else np.float32
    data = np.empty((ntime, nchan, nprod), dtype=dtype)
    s2 = np.empty((ntime, nchan, nprod), dtype=np.float32) if with_s2 else None
    for names in groups:
        group = Group(names, mu, accumulations)
        for pattern in patterns:
            group.add(pattern, freq, times, cross)
        group.finish()
        if with_s2:
            mean, sq = draw_raw(group, streams["noise"], streams["interference"])
            data[:, :, index[(names[0], names[0])]] = mean
            s2[:, :, index[(names[0], names[0])]] = sq
        elif not cross:
            data[:, :, index[(names[0], names[0])]] = draw_dumps(
                group, streams["noise"], streams["interference"], cross=False)
        else:
            q = draw_dumps(group, streams["noise"], streams["interference"], cross=True)
            for x, a in enumerate(names):
                for y, b in enumerate(names):
                    if (a, b) in index:
                        plane = q[:, :, x, y]
                        if a == b:
                            plane = plane.real
                        data[:, :, index[(a, b)]] = plane
        del group

    # truth
    inr = np.zeros((ntime, nchan, nprod), dtype=np.float32)
    by_kind = {}
    for pattern in patterns:
        contrib = np.zeros((ntime, nchan, nprod), dtype=np.float32)
        for j, (a, b) in enumerate(products):
            sa, sb = pattern.scale.get(a, 0.0), pattern.scale.get(b, 0.0)
            if sa > 0 and sb > 0:
                contrib[:, :, j] = pattern.inr * math.sqrt(sa * sb)
        inr += contrib
        if pattern.code in by_kind:
            by_kind[pattern.code] += contrib
        else:
            by_kind[pattern.code] = contrib
    kind = np.zeros((ntime, nchan, nprod), dtype=np.uint8)
    best = np.zeros((ntime, nchan, nprod), dtype=np.float32)
    for code in sorted(by_kind):
        larger = by_kind[code] > best
        kind[larger] = code
        np.maximum(best, by_kind[code], out=best)
    del best, by_kind
    mu_out = np.empty((ntime, nchan, nprod), dtype=np.float32)
    for j, (a, b) in enumerate(products):
        mu_out[:, :, j] = np.sqrt(mu[a] * mu[b])

    # dropped dumps and upstream flags
    dropped, nan_fill = _dropped_dumps(streams["dropped"], ntime, dropped_fraction)
    if dropped.any():
        data[dropped & ~nan_fill] = 0
        data[nan_fill] = np.nan
        if s2 is not None:
            s2[dropped & ~nan_fill] = 0
            s2[nan_fill] = np.nan
        inr[dropped] = 0
        kind[dropped] = 0
    flags = None
    if upstream_flag_fraction > 0:
        flags = _upstream_flags(streams["flags"], data.shape, upstream_flag_fraction)

    product_names = [f"{a}-{b}" for a, b in products]
    chunks = (min(ntime, 128), nchan, nprod)

    def fill_scan(f):
        f.create_dataset("data", data=data, chunks=chunks)
        f.create_dataset("time", data=times)
        f.create_dataset("freq", data=freq)
        f.create_dataset("products", data=_strings(product_names), dtype=h5py.string_dtype())
        if flags is not None:
            f.create_dataset("flags", data=flags, chunks=chunks, compression="gzip",
                             compression_opts=1)
        if s2 is not None:
            f.create_dataset("s2", data=s2, chunks=chunks)
        f.attrs.update({
            "band": band, "integration_time": float(integration_time),
            "channel_width": float(channel_width), "accumulations": int(accumulations),
            "presum": 1, "voltage": "complex", "observatory": OBSERVATORY, "scan": name,
            "simulated_by": f"rfisieve.sim.scans {__version__}", "seed": int(seed),
        })

    def fill_truth(f):
        opts = dict(chunks=chunks, compression="gzip", compression_opts=1, shuffle=True)
        f.create_dataset("inr", data=inr, **opts)
        f.create_dataset("kind", data=kind, **opts)
        f.create_dataset("dropped", data=dropped)
        f.create_dataset("mu", data=mu_out, chunks=chunks)
        f.create_dataset("products", data=_strings(product_names), dtype=h5py.string_dtype())
        f.attrs.update({
            "scan": name, "seed": int(seed), "kinds": KINDS_JSON,
            "accumulations": int(accumulations), "band": band,
            "emitters": json.dumps(specs, default=float),
            "simulated_by": f"rfisieve.sim.scans {__version__}",
        })

    _write_atomic(path, fill_scan)
    if truth_path is not None:
        _write_atomic(truth_path, fill_truth)

    counts = {KIND_NAMES[int(c)]: int(n) for c, n in zip(*np.unique(kind, return_counts=True))
              if c != 0}
    return {
        "scan": name, "path": str(path),
        "truth_path": None if truth_path is None else str(truth_path),
        "band": band, "shape": data.shape, "dtype": np.dtype(dtype).name,
        "products": product_names, "start_time": float(times[0] - integration_time / 2),
        "stop_time": float(times[-1] + integration_time / 2),
        "accumulations": accumulations,
        "emitters": [(p.kind, p.spec.get("name", "")) for p in patterns],
        "kinds": counts, "interfered_fraction": float(np.mean(inr > 0)),
        "dropped_dumps": int(dropped.sum()),
        "upstream_flagged_fraction": 0.0 if flags is None else float(flags.mean()),
        "s2": bool(with_s2), "seed": int(seed),
    }


# --------------------------------------------------------------------------------------
# a night
# --------------------------------------------------------------------------------------

def _night_extras(i, ntime, nchan):
    """Extra invented emitters of the i-th scan of the night (band-agnostic)."""
    t, c = ntime, nchan
    if i % 6 == 4:
        return [
            {"kind": "burst", "name": "strong broadband burst (invented: lightning)",
             "inr": 30.0, "start": int(0.62 * t), "stop": int(0.62 * t) + 2},
            {"kind": "noiselike", "name": "wideband interference block (invented)",
             "channels": [int(0.30 * c), max(int(0.36 * c), int(0.30 * c) + 1)],
             "start": int(0.40 * t), "stop": max(int(0.55 * t), int(0.40 * t) + 1),
             "inr": 4.0},
        ]
    if i % 6 == 5:
        return [
            {"kind": "intermittent", "signal": "noise",
             "name": "intermittent wideband link (invented)",
             "channels": [int(0.55 * c), max(int(0.58 * c), int(0.55 * c) + 1)],
             "inr": 6.0, "on_fraction": 0.25, "mean_on": max(2.0, t / 50)},
            {"kind": "noiselike", "name": "weak interference block (invented)",
             "channels": [int(0.12 * c), max(int(0.16 * c), int(0.12 * c) + 1)],
             "start": int(0.2 * t), "stop": max(int(0.3 * t), int(0.2 * t) + 1),
             "inr": 2.0},
            {"kind": "pulsed", "name": "pulsed train every 8th dump (invented)",
             "channels": [int(0.70 * c), max(int(0.71 * c), int(0.70 * c) + 1)],
             "inr": 20.0, "duty": 0.05, "period": 8, "on": 1},
        ]
    return []


def night_plan(*, nscans=6, bands=("L", "P"), ntime=1024, nchan=512, accumulations=1024,
               s2_accumulations=128, integration_time=2.0, start_time=DEFAULT_START,
               s2="one", seed=0, antennas=("pier1", "pier2"), feeds=("a", "b"), gap_s=120.0):
    """The keyword arguments of :func:`simulate_scan` for each scan of a night.

    Scan i (bands cycling) has its band's default emitters and, cycling over six:
    0 plain with a few dropped dumps; 1 upstream flags; 2 cross products (complex64,
    first feed); 3 /s2 recorded (first feed, ``s2_accumulations``); 4 dropped dumps,
    upstream flags, a strong broadband burst and a noise-like block; 5 an intermittent
    noise emitter, a weak noise-like block and a slow pulsed train.  Start times follow
    each other with ``gap_s`` between scans, rounded up to the minute.
    """
    if s2 not in ("none", "one", "all"):
        raise ValueError(f"s2 must be 'none', 'one' or 'all', got {s2!r}")
    bands = tuple(bands)
    for band in bands:
        check_band(band)
    if nscans < 1:
        raise ValueError("nscans must be at least 1")
    t0 = parse_time(start_time)
    duration = ntime * float(integration_time)
    step = math.ceil((duration + gap_s) / 60.0) * 60.0
    plans = []
    for i in range(nscans):
        band = bands[i % len(bands)]
        start = t0 + i * step
        slot = i % 6
        kw = dict(band=band, ntime=ntime, nchan=nchan, antennas=tuple(antennas),
                  feeds=tuple(feeds), accumulations=accumulations,
                  integration_time=integration_time, start_time=start,
                  extra_emitters=_night_extras(i, ntime, nchan),
                  seed=int(np.random.SeedSequence([int(seed), i]).generate_state(1)[0]))
        if slot == 0:
            kw.update(dropped_fraction=0.004)
        elif slot == 1:
            kw.update(upstream_flag_fraction=0.02)
        elif slot == 2 and len(antennas) >= 2 and s2 != "all":
            kw.update(cross=True, feeds=tuple(feeds)[:1])
        elif slot == 3 and s2 == "one":
            kw.update(with_s2=True, feeds=tuple(feeds)[:1], accumulations=s2_accumulations,
                      dropped_fraction=0.004)
        elif slot == 4:
            kw.update(dropped_fraction=0.01, upstream_flag_fraction=0.01)
        if s2 == "all":
            kw.update(with_s2=True, accumulations=s2_accumulations, cross=False)
        plans.append((scan_name(start, band), kw))
    return plans


def simulate_night(outdir, *, nscans=6, bands=("L", "P"), ntime=1024, nchan=512,
                   accumulations=1024, s2_accumulations=128, integration_time=2.0,
                   start_time=DEFAULT_START, s2="one", seed=0, antennas=("pier1", "pier2"),
                   feeds=("a", "b"), gap_s=120.0):
    """Simulate a night of scans: ``<outdir>/scans/<scan>.h5`` and
    ``<outdir>/truth/<scan>.truth.h5``.

    The default night: six scans of 1024 dumps x 512 channels, alternating L and P,
    from 2026-12-01 21:05 UTC, 2 s dumps, N = 1024; four auto products (pier1.a,
    pier1.b, pier2.a, pier2.b) except the cross scan (pier1.a, pier2.a and
    pier1.a-pier2.a, complex64) and the /s2 scan (pier1.a, pier2.a, N = 128).  See :func:`night_plan` for what each scan holds.

    Parameters
    ----------
    outdir : path-like
    nscans : int
    bands : sequence of str
        Bands in turn (P, L, C).
    ntime, nchan, accumulations, integration_time, antennas, feeds :
        As in :func:`simulate_scan`, for every scan.
    s2_accumulations : int
        N of the scans that record /s2.
    start_time : float or str
        Start of the first scan.
    s2 : {"one", "all", "none"}
        Which scans record /s2: the fourth, every one, or none.
    seed : int
        Seed of the night; each scan's seed is derived from it and its index.
    gap_s : float
        Time between scans, s (start times are rounded up to whole minutes).

    Returns
    -------
    dict
        ``outdir``, ``scans`` (list of :func:`simulate_scan` summaries) and
        ``elapsed_s``.
    """
    began = _time.perf_counter()
    outdir = Path(outdir)
    plans = night_plan(nscans=nscans, bands=bands, ntime=ntime, nchan=nchan,
                       accumulations=accumulations, s2_accumulations=s2_accumulations,
                       integration_time=integration_time, start_time=start_time, s2=s2,
                       seed=seed, antennas=antennas, feeds=feeds, gap_s=gap_s)
    summaries = []
    for name, kw in plans:
        summaries.append(simulate_scan(outdir / "scans" / f"{name}.h5",
                                       outdir / "truth" / f"{name}.truth.h5", **kw))
    return {"outdir": str(outdir), "scans": summaries,
            "elapsed_s": _time.perf_counter() - began}


# --------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------

_EPILOG = """\
writes:
  OUTDIR/scans/<scan>.h5        scan files (docs/design.md 3.1 layout)
  OUTDIR/truth/<scan>.truth.h5  truth: /inr (interference-to-noise ratio per sample),
                                /kind (0 clean, 1 carrier, 2 pulsed, 3 burst,
                                4 drifting, 5 intermittent, 6 noiselike), /dropped
scan names look like qro_20261201_2105_L (observatory, UTC date, start time, band).

The default night (6 scans x 1024 dumps x 512 channels, L and P in turn) holds
carriers, pulsed trains, broadband bursts, a drifting carrier, intermittent emitters,
noise-like blocks, bandpass ripple, gain and sky drift, dropped dumps, upstream flags,
one scan with cross products and one with /s2.

examples:
  rfisieve simulate demo_night
  rfisieve simulate small --scans 2 --dumps 256 --channels 128 --seed 7
  rfisieve simulate cbands --bands C,L --s2
"""


def _handle(args):
    from rfisieve.errors import RfisieveError
    bands = tuple(b.strip() for b in args.bands.split(",") if b.strip())
    s2 = "all" if args.s2 else ("none" if args.no_s2 else "one")
    out = Path(args.outdir)
    if out.is_dir() and any(out.iterdir()) and not args.force:
        raise RfisieveError(f"{out}: the folder is not empty; simulating into it would mix two nights "
                            "(use an empty folder, or --force to write into it anyway)")
    if out.exists() and not out.is_dir():
        raise RfisieveError(f"{out}: exists and is not a folder")
    try:
        result = simulate_night(args.outdir, nscans=args.scans, bands=bands,
                                ntime=args.dumps, nchan=args.channels,
                                accumulations=args.accumulations,
                                s2_accumulations=args.s2_accumulations,
                                integration_time=args.integration_time,
                                start_time=args.start, s2=s2, seed=args.seed)
    except ValueError as err:
        raise RfisieveError(f"simulate: {err}") from err
    out = Path(args.outdir)
    if not args.quiet:
        for s in result["scans"]:
            extras = [f"{s['shape'][2]} product{'s' if s['shape'][2] != 1 else ''}", s["dtype"]]
            if s["s2"]:
                extras.append("/s2")
            if s["dropped_dumps"]:
                n_drop = s["dropped_dumps"]
                extras.append(f"{n_drop} dropped dump{'s' if n_drop != 1 else ''}")
            if s["upstream_flagged_fraction"]:
                extras.append(f"{100 * s['upstream_flagged_fraction']:.1f}% upstream flags")
            print(f"  {s['scan']}: {s['shape'][0]} dumps x {s['shape'][1]} channels, "
                  f"{', '.join(extras)}; {100 * s['interfered_fraction']:.1f}% of samples "
                  f"with interference")
    n = len(result["scans"])
    print(f"wrote {n} scan{'s' if n != 1 else ''} to {out / 'scans'} and their truth files to "
          f"{out / 'truth'} ({result['elapsed_s']:.1f} s)")
    return 0


def register_cli(subparsers):
    """Add the ``simulate`` subcommand to an argparse ``subparsers`` object.

    The subparser's ``func`` default is the handler; call ``args.func(args)``.
    """
    p = add_command(
        subparsers, "simulate", _handle,
        formatter=argparse.RawDescriptionHelpFormatter,
        help="simulate a night of scans of the Quillmoor Radio Observatory, with truth",
        description=textwrap.fill(
            "Simulate a night of scan files of the fictional Quillmoor Radio Observatory, "
            "with interference of known strength and a truth file per scan.  Noise follows "
            "the radiometer equation exactly (dump powers are Gamma-distributed); "
            "interference is modelled at the voltage level.", width=78),
        epilog=_EPILOG,
        options=[
            ("outdir", {"metavar": "OUTDIR", "help": "directory to write scans/ and truth/ into"}),
            ("--scans", {"type": int, "default": 6, "metavar": "N",
                         "help": "number of scans (default: %(default)s)"}),
            ("--dumps", {"type": int, "default": 1024, "metavar": "T",
                         "help": "dumps per scan (default: %(default)s)"}),
            ("--channels", {"type": int, "default": 512, "metavar": "F",
                            "help": "channels per scan (default: %(default)s)"}),
            ("--bands", {"default": "L,P", "metavar": "LIST",
                         "help": f"comma-separated bands used in turn, from {', '.join(BANDS)} "
                        "(default: %(default)s)"}),
            ("--seed", {"type": int, "default": 0, "metavar": "S",
                        "help": "random seed; the same seed gives the same files (default: %(default)s)"}),
            ("--accumulations", {"type": int, "default": 1024, "metavar": "N",
                                 "help": "raw spectra per dump; relative noise 1/sqrt(N) (default: %(default)s)"}),
            ("--integration-time", {"type": float, "default": 2.0, "metavar": "SEC",
                                    "help": "dump length in seconds (default: %(default)s)"}),
            ("--start", {"default": DEFAULT_START, "metavar": "ISO",
                         "help": "UTC start of the first scan, ISO 8601 (default: %(default)s)"}),
        ])
    group = p.add_mutually_exclusive_group()
    group.add_argument("--s2", action="store_true",
                       help="record /s2 (sum of squared raw powers) in every scan; every raw "
                            "spectrum is simulated, with --s2-accumulations per dump "
                            "(default: only the fourth scan records /s2)")
    group.add_argument("--no-s2", action="store_true", help="record /s2 in no scan")
    p.add_argument("--s2-accumulations", type=int, default=128, metavar="M",
                   help="raw spectra per dump in scans that record /s2 (default: %(default)s)")
    p.add_argument("--quiet", action="store_true", help="print only the closing line")
    p.add_argument("--force", action="store_true",
                   help="write into OUTDIR even when it is not empty (files of the same name are replaced)")
    return p

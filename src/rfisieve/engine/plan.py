"""Planning a scan: chunks of dumps and the halo rules of each stage.

See :mod:`rfisieve.engine` for the halo rule and the two ways through a scan.

Gaps in time
------------
A scan whose ``/time`` jumps by more than ``GAP_FACTOR`` integration times
(:mod:`rfisieve.io.scan`) is flagged as contiguous stretches (``scan.segments``), each
on its own, as if it were a scan of its own: chunks never straddle a gap
(:func:`segment_chunks`), halos stop at gaps (:func:`halo_span`), dump numbers that
align SumThreshold's background cells and the kurtosis blocks count from the stretch's
first dump, the noise pre-pass and the per-channel cut are per stretch.  So a stretch
gets exactly the mask it would get alone (tests/test_gaps.py).
"""

from pathlib import Path

import numpy as np

from rfisieve.errors import RfisieveError, ScanError
from rfisieve.io.scan import open_scan


#: Halo (dumps) of the merge stage's SIR growth along time when its reach is
#: unbounded (``growth.reach_time: null``).  A flagged run of L dumps grows by at most
#: eta L / (1 - eta) on each side (from the SIR definition), so 256 dumps make growth
#: exact for runs up to 1024 dumps at eta = 0.2.  With a bounded reach R the halo is
#: R + 1 dumps and the growth is exact (see :func:`merge_halo`).
SIR_HALO = 256


#: Noise pre-pass: the SumThreshold noise sigma of each product is estimated once per
#: scan on windows of NOISE_WINDOW dumps (at most NOISE_WINDOWS of them, spread evenly
#: over the scan, and at most 1 / NOISE_SHARE of its dumps) and used by every chunk, so
#: thresholds do not depend on chunking.
NOISE_WINDOW = 256


NOISE_WINDOWS = 4


#: The pre-pass reads at most one dump in NOISE_SHARE (at least one window): on a scan of
#: 1024 dumps four windows were the whole scan, and a short scan paid for its flagging
#: twice (bench/throughput.py's night of 1024-dump scans: the pre-pass took 0.057 of a
#: scan's 0.158 s).  One window of 256 dumps x 256 channels still gives the sigma to a
#: few tenths of a percent (the MAD's sampling error; common practice).
NOISE_SHARE = 4


def _sumthreshold_settings(band):
    st = dict(band["sumthreshold"])
    st.pop("enabled", None)
    return st


def _kurtosis_halo(band, scan):
    if not band["kurtosis"]["enabled"] or scan.has_s2:
        return 0
    from rfisieve.detect.kurtosis import block_halo

    return int(block_halo(int(band["kurtosis"]["block_dumps"])))


def detect_halo(band, scan):
    """Halo in dumps on each side of a chunk for the detection stage."""
    halo = 0
    if band["sumthreshold"]["enabled"]:
        from rfisieve.detect.sumthreshold import sumthreshold_halo

        halo = max(halo, int(sumthreshold_halo(_sumthreshold_settings(band))))
    return max(halo, _kurtosis_halo(band, scan))


def merge_halo(band):
    """Halo in dumps on each side of a chunk for the merge stage's SIR growth."""
    from rfisieve.detect.growth import sir_halo

    g = band["growth"]
    if not (g["enabled"] and g["eta"] > 0 and g["time"]):
        return 0
    reach = g.get("reach_time")
    return SIR_HALO if reach is None else int(sir_halo(g["eta"], reach=int(reach)))


def _chunks(ntime, chunk_dumps):
    return [[s, min(s + chunk_dumps, ntime)] for s in range(0, ntime, chunk_dumps)]


def segment_chunks(segments, chunk_dumps):
    """Chunks of ``chunk_dumps`` dumps within each contiguous stretch ``[start, stop)``:
    a chunk never straddles a gap."""
    return [[s + a, s + b] for s, e in segments for a, b in _chunks(e - s, chunk_dumps)]


def split_at_gaps(chunks, segments):
    """``chunks`` with every chunk that straddles a stretch boundary cut there."""
    out = []
    for c0, c1 in chunks:
        for s, e in segments:
            a, b = max(c0, s), min(c1, e)
            if a < b:
                out.append([a, b])
    return out


def segment_of(dump, segments):
    """The stretch ``(start, stop)`` that holds dump number ``dump``."""
    for s, e in segments:
        if s <= dump < e:
            return s, e
    raise ValueError(f"dump {dump} lies in no stretch of {segments}")


def halo_span(c0, c1, halo, ntime, segments=None):
    """Rows [a, b) read for chunk [c0, c1) with ``halo`` dumps each side, clamped to the
    scan, or to the chunk's contiguous stretch when ``segments`` are given."""
    lo, hi = (0, ntime) if not segments else segment_of(c0, segments)
    return max(lo, c0 - halo), min(hi, c1 + halo)


def window_span(window, halo, ntime, segments=None):
    """Rows [a, b) read for a window of chunks: every chunk's :func:`halo_span`."""
    spans = [halo_span(c0, c1, halo, ntime, segments) for c0, c1 in window]
    return min(a for a, _ in spans), max(b for _, b in spans)


def _check_run(run):
    cd = run.get("chunk_dumps")
    if not isinstance(cd, int) or isinstance(cd, bool) or cd < 1:
        raise RfisieveError(f"run config: chunk_dumps = {cd!r}, expected a whole number of dumps >= 1")
    w = run.get("workers")
    if not isinstance(w, int) or isinstance(w, bool) or w < 1:
        raise RfisieveError(f"run config: workers = {w!r}, expected a whole number >= 1")


def plan_scan(scan_path, band, run):
    """Plan the chunks of one scan: a JSON-serialisable dict (see module docstring)."""
    _check_run(run)
    with open_scan(scan_path, run.get("layout")) as scan:
        _check_band_matches(scan, band)
        return {
            "scan": scan.name,
            "path": str(Path(scan_path).resolve()),
            "band": scan.band,
            "ntime": scan.ntime,
            "nchan": scan.nchan,
            "nprod": scan.nprod,
            "chunk_dumps": int(run["chunk_dumps"]),
            "halo": detect_halo(band, scan),
            "sir_halo": merge_halo(band),
            "chunks": segment_chunks(scan.segments, int(run["chunk_dumps"])),
            "segments": scan.segments,
            "gaps": [{"after_dump": i, "seconds": sec} for i, sec in scan.gaps],
            "has_s2": bool(scan.has_s2),
            "products": list(scan.products),
            "autos": [bool(a) for a in scan.autos],
        }


def _check_band_matches(scan, band):
    want = band.get("band")
    if want and scan.band != want:
        raise ScanError(scan.path, f"band is {scan.band!r} but the band config given is for {want!r}")


def reference_windows(ntime):
    """The [start, stop) windows whose bandpass shapes make the scan's reference
    (:func:`rfisieve.detect.bandpass.reference_of`): NOISE_WINDOWS windows of NOISE_WINDOW
    dumps spread from the first dump to the last, or, for a stretch of at most
    NOISE_WINDOWS x NOISE_WINDOW dumps, windows of about NOISE_WINDOW dumps tiling it (the
    whole stretch when it is shorter than one).  From 4096 dumps on these are the noise
    windows (:func:`noise_windows`)."""
    ntime = int(ntime)
    if ntime <= NOISE_WINDOW * NOISE_WINDOWS:
        n = max(1, ntime // NOISE_WINDOW)
        edges = np.linspace(0, ntime, n + 1).round().astype(int)
        return [[int(a), int(b)] for a, b in zip(edges[:-1], edges[1:])]
    return _spread(ntime, NOISE_WINDOWS)


def _spread(ntime, n):
    """n windows of NOISE_WINDOW dumps spread evenly from dump 0 to the last dump."""
    starts = np.linspace(0, ntime - NOISE_WINDOW, n).round().astype(int)
    return [[int(a), int(a) + NOISE_WINDOW] for a in starts]


def noise_windows(ntime):
    """The [start, stop) dump windows of the noise pre-pass (independent of chunking):
    n = min(NOISE_WINDOWS, ntime // (NOISE_SHARE x NOISE_WINDOW)) windows of NOISE_WINDOW
    dumps, at least one, spread evenly from the scan's first dump to its last (the first
    window starts at dump 0; with two or more, the last ends at the last dump); the whole
    scan when it is not longer than one window."""
    ntime = int(ntime)
    if ntime <= NOISE_WINDOW:
        return [[0, ntime]]
    return _spread(ntime, max(1, min(NOISE_WINDOWS, ntime // (NOISE_SHARE * NOISE_WINDOW))))

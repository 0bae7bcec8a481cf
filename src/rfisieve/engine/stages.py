"""The stages a scan goes through: :func:`detect` (one detector, a partial mask),
:func:`merge` (partial masks into the final mask) and :func:`flag_scan` (both in one pass).
"""

from pathlib import Path

import dask
import h5py
import numpy as np

from rfisieve import bits
from rfisieve.detect.masks import channel_cut
from rfisieve.engine.executor import _run_detection, _Scheduler, run_windows
from rfisieve.engine.pages import small_pages
from rfisieve.engine.plan import _check_band_matches, _check_run, merge_halo, segment_chunks, segment_of
from rfisieve.engine.planes import DETECTORS, _extra_bits, _merge_plane, _meta, _sk_edges
from rfisieve.errors import RfisieveError, ScanError
from rfisieve.io.maskfile import (_copy_sk_diag, _create_mask_file, _write_attrs, _write_noise,
                                  _write_sk_diag)
from rfisieve.io.scan import atomic_output, open_scan


def _fail_clean(fn):
    """Turn low-level read errors inside dask tasks into one-line ScanErrors."""
    def wrapper(scan_path, *args, **kwargs):
        try:
            return fn(scan_path, *args, **kwargs)
        except RfisieveError:
            raise
        except (OSError, KeyError) as err:
            raise ScanError(scan_path, f"failed while flagging ({' '.join(str(err).split())[:160]})") from None
    wrapper.__name__ = fn.__name__
    wrapper.__doc__ = fn.__doc__
    return wrapper


@small_pages
@_fail_clean
def detect(scan_path, out_path, detector, band, run, plan=None, progress=None, jobs=1):
    """Run one detector over a scan; write its partial mask (its bit + the invalid bit).

    ``jobs``: detect jobs running at once on this machine; they share the memory budget.
    """
    if detector not in DETECTORS:
        raise RfisieveError(f"unknown detector {detector!r}; expected one of {', '.join(DETECTORS)}")
    _check_run(run)
    with open_scan(scan_path, run.get("layout")) as scan, _Scheduler(run) as sched:
        _check_band_matches(scan, band)
        meta = _meta(scan, band)
        with atomic_output(out_path) as tmp, h5py.File(tmp, "w") as f:
            _create_mask_file(f, scan, int(run["chunk_dumps"]))
            f.attrs["detector"] = detector
            flags = f["flags"]
            hist = np.zeros((scan.nprod, len(_sk_edges(meta)) - 1), dtype=np.int64)

            def sink(c0, c1, res):
                out, h = res[detector]
                flags[c0:c1] = out
                if h is not None:
                    hist[...] += h

            used = _run_detection(scan, [detector], band, run, plan, sched, progress, sink, jobs=jobs)
            _write_noise(f, used)
            if detector == "sk":
                _write_sk_diag(f, hist, meta, band, _sk_edges(meta))


def _stack(planes):
    return np.stack(planes, axis=-1)


def _input_and_static(scan, a, b, meta):
    flags = scan.read(a, b, ("flags",))["flags"] if scan.has_flags else None
    return _extra_bits((b - a, scan.nchan, scan.nprod), flags, meta["static"])


def _channel_cut_pass(flags, counts, segments, limit, chunk_dumps):
    """Second pass: set the cut bit on channels flagged above ``limit`` over each
    contiguous stretch (``counts[k]``: flagged samples per channel of stretch ``k``).
    Returns True when the cut changed the mask."""
    changed = False
    for (start, stop), seg_counts in zip(segments, counts):
        changed |= _channel_cut_stretch(flags, seg_counts, start, stop, limit, chunk_dumps)
    return changed


def _channel_cut_stretch(flags, counts, start, stop, limit, chunk_dumps):
    ntime = stop - start
    cut = channel_cut(counts, ntime, limit)  # (chan, prod)
    cut &= counts < ntime  # a channel flagged throughout gains nothing
    if not cut.any():
        return False
    for c0 in range(start, stop, chunk_dumps):
        c1 = min(stop, c0 + chunk_dumps)
        block = flags[c0:c1]
        block[cut[None, :, :] & (block == 0)] = bits.CUT  # only what the cut adds
        flags[c0:c1] = block
    return True


@small_pages
@_fail_clean
def merge(scan_path, partial_paths, out_path, band, run, band_source=None, progress=None):
    """Merge partial masks with the upstream, invalid and known bits into the final mask.

    Then grows the detector flags with the SIR operator (bit 5) and applies the
    occupancy cuts (bit 6): per dump within each chunk, per channel over the scan.
    """
    _check_run(run)
    chunk_dumps = int(run["chunk_dumps"])
    partial_paths = [Path(p) for p in partial_paths]
    with open_scan(scan_path, run.get("layout")) as scan, _Scheduler(run) as sched:
        _check_band_matches(scan, band)
        meta = _meta(scan, band)
        parts = []
        try:
            for pp in partial_paths:
                try:
                    h = h5py.File(pp, "r")
                except OSError as err:
                    raise ScanError(pp, f"partial mask cannot be opened ({err})") from None
                parts.append(h)
                if h["flags"].shape != scan.shape:
                    raise ScanError(pp, f"partial mask has shape {h['flags'].shape}, scan has {scan.shape}")
            with atomic_output(out_path) as tmp, h5py.File(tmp, "w") as f:
                _create_mask_file(f, scan, chunk_dumps)
                _write_attrs(f, band, band_source)
                flags = f["flags"]
                segments = scan.segments  # contiguous stretches: growth and cuts stop at gaps
                counts = np.zeros((len(segments), scan.nchan, scan.nprod), dtype=np.int64)
                halo = merge_halo(band)

                def read(lo, hi):
                    det = np.zeros((hi - lo, scan.nchan, scan.nprod), dtype=np.uint8)
                    for h in parts:
                        det |= h["flags"][lo:hi]
                    return lo, det, _input_and_static(scan, lo, hi, meta)

                def build(block, base, c0, c1, a, b):
                    lo, det, extra = block
                    core = (c0 - a, c1 - a)
                    return dask.delayed(_stack)(
                        [dask.delayed(_merge_plane)(sched.put(det[a - lo:b - lo, :, p]),
                                                    sched.put(extra[a - lo:b - lo, :, p]), band, core)
                         for p in range(scan.nprod)])

                def sink(c0, c1, out):
                    flags[c0:c1] = out
                    counts[segments.index(list(segment_of(c0, segments)))] += (out != 0).sum(axis=0)

                run_windows(sched, segment_chunks(segments, chunk_dumps), scan.ntime, halo,
                            max(2, 2 * sched.workers), read, build, sink, progress, segments=segments)
                _channel_cut_pass(flags, counts, segments, band["cuts"]["channel_limit"], chunk_dumps)
                _copy_sk_diag(parts, f, meta, band, _sk_edges(meta))
                for h in parts:
                    if "noise_sigma" in h.attrs:
                        f.attrs["noise_sigma"] = h.attrs["noise_sigma"]
        finally:
            for h in parts:
                h.close()


def flag_scan(scan_path, out_path, band, run, band_source=None, progress=None, jobs=1, observe=None,
              observe_data=None):
    """Both detectors and the merge in one pass over the scan (no partial masks).

    Gives the same mask file as :func:`detect` for each detector followed by
    :func:`merge` (tests/test_engine.py checks it), in one read of the scan: each
    (chunk x product) task runs :func:`_flag_product` on its chunk with the detection
    halo widened by the merge halo, and the driver writes the final mask (in a writer
    thread, while the next window is flagged).  The per-channel occupancy cut is then
    applied in a second pass over the finished mask, as in :func:`merge`.

    ``observe(start, block)``, when given, sees the mask while it is in memory: each
    chunk's values as the writer thread stores them, before the per-channel cut.
    Returns ``{"channel_cut": bool}``: when False (the usual case) the cut changed
    nothing, and counts added up over the blocks observed are the counts of the
    finished mask file.  ``observe_data(start, block)``, when given, sees each block of
    the scan as read (a :meth:`rfisieve.io.scan.Scan.read` dict holding dumps ``start``
    onwards; blocks overlap by the halos), in the reader thread.
    """
    out_path = Path(out_path)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    return _flag_one_pass(scan_path, out_path, band, run, band_source, progress, jobs, observe, observe_data)


@small_pages
@_fail_clean
def _flag_one_pass(scan_path, out_path, band, run, band_source, progress, jobs=1, observe=None,
                   observe_data=None):
    from concurrent.futures import ThreadPoolExecutor

    _check_run(run)
    chunk_dumps = int(run["chunk_dumps"])
    with open_scan(scan_path, run.get("layout")) as scan, _Scheduler(run) as sched:
        _check_band_matches(scan, band)
        with atomic_output(out_path) as tmp, h5py.File(tmp, "w") as f:
            _create_mask_file(f, scan, chunk_dumps)
            _write_attrs(f, band, band_source)
            flags = f["flags"]
            segments = scan.segments
            counts = np.zeros((len(segments), scan.nchan, scan.nprod), dtype=np.int64)
            hist = []   # the SK histogram's length follows the thresholds: summed as it arrives
            pending = []

            def write(c0, c1, out):
                flags[c0:c1] = out
                counts[segments.index(list(segment_of(c0, segments)))] += (out != 0).sum(axis=0)
                if observe is not None:
                    observe(c0, out)

            with ThreadPoolExecutor(1, thread_name_prefix="rfisieve-write") as writer:
                def sink(c0, c1, res):
                    out, h = res["final"]
                    if h is not None:
                        hist[:] = [h if not hist else hist[0] + h]
                    while pending and pending[0].done():
                        pending.pop(0).result()  # re-raise a failed write at once
                    pending.append(writer.submit(write, c0, c1, out))

                used = _run_detection(scan, list(DETECTORS), band, run, None, sched, progress, sink,
                                      grow=merge_halo(band), jobs=jobs, observe_data=observe_data)
                for fut in pending:
                    fut.result()
            cut = _channel_cut_pass(flags, counts, segments, band["cuts"]["channel_limit"], chunk_dumps)
            edges = _sk_edges(used)
            hist = hist[0] if hist else np.zeros((scan.nprod, len(edges) - 1), np.int64)
            _write_sk_diag(f, hist, used, band, edges)
            _write_noise(f, used)
    return {"channel_cut": bool(cut)}

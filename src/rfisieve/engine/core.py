"""The flagging engine: chunks of dumps with halos, (chunk x product) tasks on dask.

Layering: this module reads scans through :mod:`rfisieve.io.scan`, calls the detectors
(pure array functions in :mod:`rfisieve.detect.kurtosis`, :mod:`rfisieve.detect.sumthreshold`,
:mod:`rfisieve.detect.growth`) and writes mask files.  It knows nothing of Snakemake.

Chunks and halos
----------------
A scan is cut along time into chunks of ``chunk_dumps`` dumps.  Each task flags its
chunk plus ``halo`` dumps on each side and keeps only the chunk's own rows.  The halo
rule (see :func:`detect_halo`) is the larger of the detectors' own reach:
SumThreshold's (per iteration, the background's reach plus the sum of M - 1 over the
time windows, from :func:`rfisieve.detect.sumthreshold.sumthreshold_halo`: 304 dumps at the
defaults) and the kurtosis blocks' (M - 1 dumps, blocks being aligned to absolute dump
numbers).  SumThreshold's noise sigma is estimated once per scan and product, on fixed
windows (:func:`noise_windows`), and its background cells are aligned to absolute dump
numbers, so within that reach a sample's result does not depend on where chunks start
or on the number of workers (tests/test_engine.py checks both).  The merge stage grows
flags with the bounded-reach SIR operator over chunks with its own halo
(:func:`merge_halo`: reach + 1 dumps, exact), and the per-channel occupancy cut needs
the whole scan's counts, so it is applied in a second pass over the finished mask.

Two ways through
----------------
The workflow runs the stages as separate jobs: :func:`detect` once per detector
(each writes a partial mask), then :func:`merge`.  :func:`flag_scan` does the same
work in one pass: each (chunk x product) task runs both detectors and the merge on a
halo widened by the merge halo (``detect_halo + merge_halo`` dumps), so no partial
mask is written or read back; the two give identical masks (tests/test_engine.py).

Parallelism
-----------
Chunks go in windows of a few chunks (:meth:`_Scheduler.window`: enough for two
(chunk x product) tasks per worker).  The driver reads each window (with halos) in one
read, one window ahead in a reader thread, and hands every (chunk x product) plane to
dask as one task: the threaded scheduler by default, or processes, or a
dask.distributed scheduler address (planes are scattered to it).

Memory is bounded by ``chunk_dumps x nchan x nprod x (in-flight chunks)``, where at
most two windows (one flagged, one read ahead; each about ``2 x workers`` (chunk x
product) planes, at least one chunk) are in memory, never by the scan's length.
"""

import json
import time as _time
from functools import partial
from pathlib import Path

import dask
import h5py
import numpy as np

from rfisieve import __version__

from rfisieve import bits
from rfisieve.errors import RfisieveError, ScanError
from rfisieve.io.scan import atomic_output, file_identity, open_scan
from rfisieve.engine.pages import small_pages
from rfisieve.detect.masks import amplitude, bit_attrs, channel_cut, invalid_mask, static_channels

DETECTORS = ("sk", "sumthreshold")

#: Halo (dumps) of the merge stage's SIR growth along time when its reach is
#: unbounded (``growth.reach_time: null``).  A flagged run of L dumps grows by at most
#: eta L / (1 - eta) on each side (from the SIR definition), so 256 dumps make growth
#: exact for runs up to 1024 dumps at eta = 0.2.  With a bounded reach R the halo is
#: R + 1 dumps and the growth is exact (see :func:`merge_halo`).
SIR_HALO = 256

#: Noise pre-pass: the SumThreshold noise sigma of each product is estimated once per
#: scan on windows of NOISE_WINDOW dumps (at most NOISE_WINDOWS of them, spread evenly
#: over the scan) and used by every chunk, so thresholds do not depend on chunking.
NOISE_WINDOW = 256
NOISE_WINDOWS = 4

#: Bin edges of the SK histogram kept for the review's kurtosis diagnostic.
SK_EDGES = np.linspace(0.0, 3.0, 301)


# -- planning -------------------------------------------------------------------
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
            "chunks": _chunks(scan.ntime, int(run["chunk_dumps"])),
            "has_s2": bool(scan.has_s2),
            "products": list(scan.products),
            "autos": [bool(a) for a in scan.autos],
        }


def _check_band_matches(scan, band):
    want = band.get("band")
    if want and scan.band != want:
        raise ScanError(scan.path, f"band is {scan.band!r} but the band config given is for {want!r}")


# -- scan metadata passed to tasks -------------------------------------------------
def _meta(scan, band):
    k = band["kurtosis"]
    meta = {
        "path": str(scan.path),
        "layout": scan.layout,
        "nchan": scan.nchan,
        "nprod": scan.nprod,
        "autos": [bool(a) for a in scan.autos],
        "has_s2": scan.has_s2,
        "accumulations": scan.accumulations,
        "presum": scan.presum,
        "d": scan.d,
        "static": static_channels(scan.freq, band.get("static")),
    }
    if k["enabled"]:
        from rfisieve.detect.kurtosis import gaussian_tail

        pfa = k["pfa"] if k.get("pfa") is not None else gaussian_tail(k["sigma"])
        if scan.has_s2:
            # Mode (a): SK per dump, M = accumulations, N = presum (DESIGN.md 3).
            m, n = scan.accumulations, scan.presum
        else:
            # Mode (b): blocks of M dumps, N = raw spectra per dump.
            m, n = int(k["block_dumps"]), scan.accumulations * scan.presum
        from rfisieve.detect.kurtosis import sk_threshold_table, sk_thresholds

        sk = {"mode": "s2" if scan.has_s2 else "block", "m": m, "n": n, "d": scan.d,
              "pfa": pfa, "method": k["method"]}
        # thresholds computed once here, not in every task (the exact tails cost ~1 s)
        sk["lower"], sk["upper"] = sk_thresholds(m, n, scan.d, pfa=pfa, method=k["method"])
        if not scan.has_s2:
            sk["table"] = sk_threshold_table(m, n, scan.d, pfa=pfa, method=k["method"])
        meta["sk"] = sk
    return meta


def _planes(block, lo, hi, p):
    """One product's 2-D (time, chan) planes of rows lo:hi of a read block (views)."""
    return {key: arr[lo:hi, :, p] for key, arr in block.items()}


def noise_windows(ntime):
    """The [start, stop) dump windows of the noise pre-pass (independent of chunking)."""
    if ntime <= NOISE_WINDOW * NOISE_WINDOWS:
        n = max(1, ntime // NOISE_WINDOW)
        edges = np.linspace(0, ntime, n + 1).round().astype(int)
        return [[int(a), int(b)] for a, b in zip(edges[:-1], edges[1:])]
    starts = np.linspace(0, ntime - NOISE_WINDOW, NOISE_WINDOWS).round().astype(int)
    return [[int(a), int(a) + NOISE_WINDOW] for a in starts]


def _noise_task(planes, band, meta, p, t0):
    from rfisieve.detect.sumthreshold import sumthreshold_noise

    prep = _prepare(planes, p, meta)
    if prep["excluded"].all():
        return np.nan
    return float(sumthreshold_noise(prep["values"], invalid=prep["excluded"], t0=t0,
                                    **_sumthreshold_settings(band)))


def _noise_prepass(scan, band, meta, sched, what):
    """Per-product SumThreshold noise sigma: the median over the pre-pass windows."""
    tasks = []
    task = dask.delayed(partial(_noise_task, band=band, meta=meta))
    for a, b in noise_windows(scan.ntime):
        block = scan.read(a, b, what)
        for p in range(scan.nprod):
            tasks.append(task(sched.put(_planes(block, 0, b - a, p)), p=p, t0=a))
    values = np.array(dask.compute(*tasks, **sched.kwargs), dtype=np.float64)
    values = values.reshape(-1, scan.nprod).T
    sigmas = []
    for row in values:
        row = row[np.isfinite(row)]
        sigmas.append(float(np.median(row)) if row.size else 1.0)
    return sigmas


def _s2_invalid(s2):
    """Samples whose recorded S2 no statistic may use: NaN, Inf, zero or negative."""
    return ~np.isfinite(s2) | (s2 <= 0)


def _prior(planes, meta, values, auto):
    """(invalid, excluded): samples no statistic may use, and those plus input/static flags."""
    invalid = invalid_mask(values, auto)
    if "s2" in planes and auto:
        invalid |= _s2_invalid(planes["s2"])
    excluded = invalid | meta["static"][np.newaxis, :]
    if "flags" in planes:
        excluded |= planes["flags"]
    return invalid, excluded


_KERNEL_DTYPES = tuple(np.dtype(t) for t in ("float32", "float64", "complex64", "complex128"))


def _prepare(planes, p, meta):
    """What both detectors need of one (chunk x product) plane, computed once.

    The one-pass kernel gives what :func:`_prior` gives (tests/test_engine.py checks it).
    """
    from rfisieve.detect._masks_kernels import prepare_plane

    auto = bool(meta["autos"][p])
    data = planes["data"]
    if data.dtype not in _KERNEL_DTYPES or (data.dtype.kind == "c" and not auto):
        # float16, or |V| of cross products (numba's complex abs differs from numpy's
        # hypotf in the last bit): the numpy definition
        values = amplitude(data, auto)
        invalid, excluded = _prior(planes, meta, values, auto)
        return {"values": values, "invalid": invalid, "excluded": excluded, "s2": planes.get("s2")}
    shape = data.shape
    values = np.empty(shape, np.float32)
    invalid = np.empty(shape, np.bool_)
    excluded = np.empty(shape, np.bool_)
    flags = planes.get("flags")
    prepare_plane(data, auto, np.ascontiguousarray(meta["static"], dtype=np.bool_),
                  np.zeros((1, 1), np.bool_) if flags is None else np.asarray(flags, dtype=np.bool_),
                  flags is not None, values, invalid, excluded)
    if "s2" in planes and auto:
        bad = _s2_invalid(planes["s2"])
        invalid |= bad
        excluded |= bad
    return {"values": values, "invalid": invalid, "excluded": excluded, "s2": planes.get("s2")}


def _detect_product(prep, p, detector, band, meta, t0, core, rows=None):
    """One detector on one (chunk x product) plane with halo rows from dump ``t0``.

    ``prep`` is :func:`_prepare`'s result.  Returns (uint8 (rows, chan) with that
    detector's bit and the invalid bit, SK histogram counts of the core rows or None);
    ``rows`` (default ``core``) are the plane rows returned.
    """
    r = slice(*(core if rows is None else rows))
    values, invalid, excluded = prep["values"], prep["invalid"], prep["excluded"]
    out = np.where(invalid[r], np.uint8(bits.INVALID), np.uint8(0))
    hist = None
    if detector == "sumthreshold" and band["sumthreshold"]["enabled"]:
        from rfisieve.detect.sumthreshold import sumthreshold_flagger

        hit = sumthreshold_flagger(values, invalid=excluded, sigma=meta["sigma"][p], t0=t0,
                                   **_sumthreshold_settings(band))
        out[hit[r] & ~excluded[r]] |= bits.SUMTHRESHOLD
    elif detector == "sk" and meta["autos"][p] and "sk" in meta:
        hit, hist = _kurtosis(prep, values, excluded, meta["sk"], t0, core)
        out[hit[r] & ~excluded[r]] |= bits.SK
    return out, hist


def _kurtosis(prep, values, excluded, sk, t0, core):
    from rfisieve.detect.kurtosis import sk_block_histogram, sk_estimator, sk_flag_blocks, sk_flag_dumps

    m, n, d = sk["m"], sk["n"], sk["d"]
    valid = ~excluded
    if sk["mode"] == "s2":
        s2 = prep["s2"]
        hit = sk_flag_dumps(values, s2, m, n, d, sk["lower"], sk["upper"], valid)
        rows = slice(core[0], core[1])
        with np.errstate(all="ignore"):
            ski = sk_estimator(values[rows].astype(np.float64) * m, s2[rows].astype(np.float64), m, n, d)
        ski = ski[valid[rows]]
        counts, _ = np.histogram(np.clip(ski[np.isfinite(ski)], SK_EDGES[0], SK_EDGES[-1] - 1e-9), SK_EDGES)
        return hit, counts.astype(np.int64)
    hit = sk_flag_blocks(values, valid, m, n, d, thresholds=sk["table"], t0=t0)
    return hit, sk_block_histogram(values, valid, m, n, d, SK_EDGES, t0=t0, rows=core)


def _flag_product(planes, p, band, meta, t0, core, grow):
    """Both detectors, SIR growth and the dump cut on one (chunk x product) plane.

    The single-pass form of :func:`detect` + :func:`merge` (used by :func:`flag_scan`):
    the plane carries the detection halo plus ``grow`` (the merge halo) rows on each
    side, so the detections of the core rows +- ``grow`` are exact and the merge of
    :func:`_merge_plane` sees exactly what it sees in the staged path.  Returns
    (final uint8 (core rows, chan), SK histogram counts of the core rows or None).
    """
    prep = _prepare(planes, p, meta)
    n = prep["values"].shape[0]
    lo, hi = max(0, core[0] - grow), min(n, core[1] + grow)
    det, hist = None, None
    for detector in DETECTORS:
        out, h = _detect_product(prep, p, detector, band, meta, t0, core, rows=(lo, hi))
        det = out if det is None else det | out
        hist = h if h is not None else hist
    flags = planes.get("flags")
    extra = _extra_bits(det.shape, None if flags is None else flags[lo:hi], meta["static"])
    return _merge_plane(det, extra, band, (core[0] - lo, core[1] - lo)), hist


def _assemble(parts, nprod):
    outs = [pt[0] for pt in parts]
    hist = np.zeros((nprod, len(SK_EDGES) - 1), dtype=np.int64)
    for p, pt in enumerate(parts):
        if pt[1] is not None:
            hist[p] += pt[1]
    return np.stack(outs, axis=-1), hist


# -- dask -------------------------------------------------------------------------
_LOCAL_SCHEDULERS = ("threads", "processes", "synchronous", "sync", "single-threaded")


def _local_get(name):
    """dask's get function for a local scheduler name."""
    if name == "threads":
        from dask.threaded import get
    elif name == "processes":
        from dask.multiprocessing import get
    else:
        from dask.local import get_sync as get
    return get


class _Scheduler:
    """dask compute options for the run config's ``scheduler`` and ``workers``."""

    def __init__(self, run):
        self.name = str(run.get("scheduler") or "threads")
        self.workers = int(run.get("workers") or 1)
        self.client = None

    def __enter__(self):
        if self.name in _LOCAL_SCHEDULERS:
            # the get function itself: a scheduler *name* makes dask import
            # dask.distributed to look for a default client (half a second per job)
            self.kwargs = {"scheduler": _local_get(self.name), "num_workers": self.workers}
        elif "://" in self.name or ":" in self.name:
            try:
                from distributed import Client
            except ImportError:  # pragma: no cover - distributed is a dependency
                raise RfisieveError("scheduler address given but dask.distributed is not installed") from None
            try:
                self.client = Client(self.name, timeout="20s", set_as_default=False)
            except (OSError, TimeoutError) as err:
                raise RfisieveError(
                    f"cannot reach the dask scheduler at {self.name} ({err}); start it or use scheduler: threads"
                ) from None
            self.kwargs = {"scheduler": self.client.get}
        else:
            raise RfisieveError(
                f"run config: scheduler = {self.name!r}, expected threads, processes, synchronous "
                "or a dask.distributed address such as tcp://host:8786"
            )
        return self

    def __exit__(self, *exc):
        if self.client is not None:
            self.client.close()
        return False

    def window(self, nprod):
        """Chunks per window: enough for two (chunk x product) tasks per worker (each
        window ends in a barrier; two tasks each keep the workers busy to its end).
        With the window read ahead, 2 x window chunks are in memory at once."""
        return max(1, -(-2 * self.workers // max(1, int(nprod))))

    def put(self, data):
        """Hand a task's input to the scheduler: as is locally, scattered to a cluster."""
        if self.client is not None:
            # a list, not the dict itself: scatter would use a dict's keys as data keys
            return self.client.scatter([data], direct=False, hash=False)[0]
        return data


def _windows(chunks, size):
    for i in range(0, len(chunks), size):
        yield chunks[i:i + size]


#: Share of the machine's memory that the chunks in flight may use.
MEMORY_SHARE = 0.25


def _window_chunks(scan, rows, wanted):
    """Chunks per window: ``wanted``, fewer when memory would not hold them.

    A chunk of ``rows`` dumps costs its stored samples plus about 20 bytes per sample of
    working arrays (float32 values, masks, background, residual and its integer grid) per
    product in work.
    """
    import psutil

    itemsize = scan.dtype.itemsize + (1 if scan.has_flags else 0) + (4 if scan.has_s2 else 0)
    per_chunk = rows * scan.nchan * scan.nprod * (itemsize + 20)
    budget = MEMORY_SHARE * psutil.virtual_memory().total
    if 2 * per_chunk > budget:  # a window and the one read ahead
        raise RfisieveError(
            f"{scan.path}: one chunk of {rows} dumps (with halos) x {scan.nchan} channels x {scan.nprod} "
            f"products needs ~{per_chunk / 2**30:.1f} GiB, more than {MEMORY_SHARE:.0%} of this machine's "
            "memory; lower chunk_dumps in the run config")
    return max(1, min(int(wanted), int(budget // (2 * per_chunk))))


def _run_detection(scan, detectors, band, run, plan, sched, progress, sink, grow=None):
    """Run detectors over every chunk; ``sink(start, stop, results_by_detector)``.

    Chunks go in windows (:meth:`_Scheduler.window`): the driver reads each window's dumps (with
    halos) in one read, one window ahead in a reader thread, and sends each
    (chunk x product) plane to the dask scheduler.  With ``grow`` (the merge halo) each
    task runs both detectors and the merge (:func:`_flag_product`) on a halo widened by
    ``grow``, and ``sink`` gets ``{"final": (mask, hist)}``.  Returns the scan metadata
    used, including the pre-pass noise sigmas (``sigma``).
    """
    from concurrent.futures import ThreadPoolExecutor

    meta = _meta(scan, band)
    what = ["data", "flags"] + (["s2"] if scan.has_s2 else [])
    halo = plan["halo"] if plan else detect_halo(band, scan)
    if grow is not None:
        halo += grow
    chunks = plan["chunks"] if plan else _chunks(scan.ntime, int(run["chunk_dumps"]))
    rows = max(c1 - c0 for c0, c1 in chunks) + 2 * halo
    windows = list(_windows(chunks, _window_chunks(scan, rows, sched.window(scan.nprod))))
    spans = [(max(0, w[0][0] - halo), min(scan.ntime, w[-1][1] + halo)) for w in windows]
    done = 0
    with ThreadPoolExecutor(1, thread_name_prefix="rfisieve-read") as reader:
        # the first window is read while the noise pre-pass runs
        ahead = reader.submit(scan.read, *spans[0], what) if windows else None
        if "sumthreshold" in detectors and band["sumthreshold"]["enabled"]:
            meta["sigma"] = _noise_prepass(scan, band, meta, sched, what)
        # band and meta bound once: dask would walk these nested dicts for every task
        flag_task = dask.delayed(partial(_flag_product, band=band, meta=meta))
        prep_task = dask.delayed(partial(_prepare, meta=meta))
        det_task = dask.delayed(partial(_detect_product, band=band, meta=meta))
        for k, window in enumerate(windows):
            block = ahead.result()
            if k + 1 < len(windows):
                ahead = reader.submit(scan.read, *spans[k + 1], what)
            base = spans[k][0]
            graph = []
            for c0, c1 in window:
                a, b = max(0, c0 - halo), min(scan.ntime, c1 + halo)
                if grow is not None:
                    parts = [flag_task(sched.put(_planes(block, a - base, b - base, p)), p=p,
                                       t0=a, core=(c0 - a, c1 - a), grow=grow)
                             for p in range(scan.nprod)]
                    graph.append([dask.delayed(_assemble)(parts, scan.nprod)])
                    continue
                preps = [prep_task(sched.put(_planes(block, a - base, b - base, p)), p=p)
                         for p in range(scan.nprod)]
                per_det = []
                for det in detectors:
                    parts = [det_task(preps[p], p=p, detector=det, t0=a, core=(c0 - a, c1 - a))
                             for p in range(scan.nprod)]
                    per_det.append(dask.delayed(_assemble)(parts, scan.nprod))
                graph.append(per_det)
            results = dask.compute(*graph, **sched.kwargs)
            del block
            for (c0, c1), per_det in zip(window, results):
                sink(c0, c1, dict(zip(["final"] if grow is not None else detectors, per_det)))
                done += 1
                if progress:
                    progress(done, len(chunks))
    return meta


def _create_mask_file(f, scan, chunk_dumps):
    rows = max(1, min(scan.ntime, chunk_dumps, (1 << 20) // max(1, scan.nchan * scan.nprod)))
    f.create_dataset(
        "flags", shape=(scan.ntime, scan.nchan, scan.nprod), dtype=np.uint8,
        chunks=(rows, scan.nchan, scan.nprod), compression="lzf", shuffle=False, fillvalue=0,
    )
    f.create_dataset("time", data=scan.time)
    f.create_dataset("freq", data=scan.freq)
    f.create_dataset("products", data=np.array(scan.products, dtype=object), dtype=h5py.string_dtype())
    f.attrs["scan"] = scan.name
    f.attrs["band"] = scan.band
    for key in ("integration_time", "channel_width", "accumulations"):
        f.attrs[key] = getattr(scan, key)
    f.attrs["rfisieve_version"] = __version__
    f.attrs["input_identity"] = json.dumps(file_identity(scan.path))
    f.attrs["created_utc"] = _time.strftime("%Y-%m-%dT%H:%M:%SZ", _time.gmtime())


def _write_sk_diag(f, hist, meta, band):
    sk = meta.get("sk")
    g = f.require_group("diagnostics/sk")
    g.create_dataset("edges", data=SK_EDGES)
    g.create_dataset("counts", data=hist)
    if sk:
        lower, upper = sk["lower"], sk["upper"]
        for key in ("m", "n", "d", "pfa", "method", "mode"):
            g.attrs[key] = sk[key]
        g.attrs["lower"], g.attrs["upper"] = float(lower), float(upper)
    g.attrs["enabled"] = bool(sk)


def _write_noise(f, meta):
    if "sigma" in meta:
        f.attrs["noise_sigma"] = np.asarray(meta["sigma"], dtype=np.float64)


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


# -- stages -------------------------------------------------------------------------
@small_pages
@_fail_clean
def detect(scan_path, out_path, detector, band, run, plan=None, progress=None):
    """Run one detector over a scan; write its partial mask (its bit + the invalid bit)."""
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
            hist = np.zeros((scan.nprod, len(SK_EDGES) - 1), dtype=np.int64)

            def sink(c0, c1, res):
                out, h = res[detector]
                flags[c0:c1] = out
                hist[...] += h

            used = _run_detection(scan, [detector], band, run, plan, sched, progress, sink)
            _write_noise(f, used)
            if detector == "sk":
                _write_sk_diag(f, hist, meta, band)


def _merge_plane(det, extra, band, core):
    """Merge one product's plane of a chunk (with SIR halo rows) into its final bits.

    ``det`` holds the partial masks' bits OR-ed, ``extra`` the input and static bits;
    returns the uint8 (core rows, chan) plane with growth (bit 5) and dump cuts (bit 6).
    """
    from rfisieve.detect._masks_kernels import merge_bits
    from rfisieve.detect.growth import sir_grow

    g = band["growth"]
    det = np.ascontiguousarray(det, dtype=np.uint8)
    extra = np.ascontiguousarray(extra, dtype=np.uint8)
    grown = np.zeros((1, 1), np.bool_)
    use_grown = bool(g["enabled"] and g["eta"] > 0)
    if use_grown:
        grown = sir_grow((det & bits.DETECTED) != 0, g["eta"], time=g["time"], freq=g["freq"],
                         reach_time=g.get("reach_time"), reach_freq=g.get("reach_freq"))
    out = np.empty((core[1] - core[0], det.shape[1]), np.uint8)
    # det | extra, the morphology bit where growth adds, and the dump cut (as
    # masks.dump_cut: flagged fraction over channels > limit), whose occupancy bit
    # marks what the cut adds: the samples no other cause flagged
    merge_bits(det, extra, grown, use_grown, core[0], core[1], bits.DETECTED, bits.MORPHOLOGY,
               float(band["cuts"]["dump_limit"]), bits.OCCUPANCY, out)
    return out


def _stack(planes):
    return np.stack(planes, axis=-1)


def _extra_bits(shape, flags, static):
    """The input bit where ``flags`` (or nothing when None) and the static bit on the
    ``static`` channels (axis 1), as uint8 of ``shape`` (time, chan[, prod])."""
    extra = np.zeros(shape, dtype=np.uint8)
    if flags is not None:
        extra[flags] |= bits.INPUT
    extra[:, static] |= bits.STATIC
    return extra


def _input_and_static(scan, a, b, meta):
    flags = scan.read(a, b, ("flags",))["flags"] if scan.has_flags else None
    return _extra_bits((b - a, scan.nchan, scan.nprod), flags, meta["static"])


def _channel_cut_pass(flags, counts, ntime, limit, chunk_dumps):
    """Second pass: set the occupancy bit on channels flagged above ``limit`` over the scan."""
    cut = channel_cut(counts, ntime, limit)  # (chan, prod)
    cut &= counts < ntime  # a channel flagged throughout gains nothing
    if not cut.any():
        return
    for c0 in range(0, ntime, chunk_dumps):
        c1 = min(ntime, c0 + chunk_dumps)
        block = flags[c0:c1]
        block[cut[None, :, :] & (block == 0)] = bits.OCCUPANCY  # only what the cut adds
        flags[c0:c1] = block


@small_pages
@_fail_clean
def merge(scan_path, partial_paths, out_path, band, run, band_source=None, progress=None):
    """Merge partial masks with the input, invalid and static bits into the final mask.

    Then grows the detector flags with the SIR operator (bit 5) and applies the
    occupancy cuts (bit 6): per dump within each chunk, per channel over the scan.
    """
    _check_run(run)
    chunk_dumps = int(run["chunk_dumps"])
    partial_paths = [Path(p) for p in partial_paths]
    with open_scan(scan_path, run.get("layout")) as scan:
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
                counts = np.zeros((scan.nchan, scan.nprod), dtype=np.int64)
                chunks = _chunks(scan.ntime, chunk_dumps)
                halo = merge_halo(band)
                workers = max(1, int(run.get("workers") or 1))
                local = _local_get("synchronous" if run.get("scheduler") == "synchronous" else "threads")
                done = 0
                for window in _windows(chunks, max(2, 2 * workers)):
                    lo, hi = max(0, window[0][0] - halo), min(scan.ntime, window[-1][1] + halo)
                    det = np.zeros((hi - lo, scan.nchan, scan.nprod), dtype=np.uint8)
                    for h in parts:
                        det |= h["flags"][lo:hi]
                    extra = _input_and_static(scan, lo, hi, meta)
                    graph = []
                    for c0, c1 in window:
                        a, b = max(0, c0 - halo) - lo, min(scan.ntime, c1 + halo) - lo
                        core = (c0 - lo - a, c1 - lo - a)
                        graph.append(dask.delayed(_stack)(
                            [dask.delayed(_merge_plane)(det[a:b, :, p], extra[a:b, :, p], band, core)
                             for p in range(scan.nprod)]))
                    for (c0, c1), out in zip(window, dask.compute(*graph, scheduler=local, num_workers=workers)):
                        flags[c0:c1] = out
                        counts += (out != 0).sum(axis=0)
                        done += 1
                        if progress:
                            progress(done, len(chunks))
                _channel_cut_pass(flags, counts, scan.ntime, band["cuts"]["channel_limit"], chunk_dumps)
                _copy_sk_diag(parts, f, meta, band)
                for h in parts:
                    if "noise_sigma" in h.attrs:
                        f.attrs["noise_sigma"] = h.attrs["noise_sigma"]
        finally:
            for h in parts:
                h.close()


def _copy_sk_diag(parts, f, meta, band):
    for h in parts:
        if "diagnostics/sk" in h:
            h.copy(h["diagnostics/sk"], f.require_group("diagnostics"), name="sk")
            return
    _write_sk_diag(f, np.zeros((len(meta["autos"]), len(SK_EDGES) - 1), dtype=np.int64), meta, band)


def _write_attrs(f, band, band_source):
    for key, value in bit_attrs().items():
        f.attrs[key] = value
    f.attrs["bit_table"] = json.dumps([{"bit": b[0], "value": b[1], "name": b[2], "meaning": b[3]}
                                       for b in bits.BIT_TABLE])
    f.attrs["band_settings"] = json.dumps(band, sort_keys=True)
    if band_source:
        f.attrs["band_config_path"] = str(band_source.get("path", ""))
        f.attrs["band_config_text"] = str(band_source.get("text", ""))


def flag_scan(scan_path, out_path, band, run, band_source=None, progress=None):
    """Both detectors and the merge in one pass over the scan (no partial masks).

    Gives the same mask file as :func:`detect` for each detector followed by
    :func:`merge` (tests/test_engine.py checks it), in one read of the scan: each
    (chunk x product) task runs :func:`_flag_product` on its chunk with the detection
    halo widened by the merge halo, and the driver writes the final mask (in a writer
    thread, while the next window is flagged).  The per-channel occupancy cut is then
    applied in a second pass over the finished mask, as in :func:`merge`.
    """
    out_path = Path(out_path)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    _flag_one_pass(scan_path, out_path, band, run, band_source, progress)


@small_pages
@_fail_clean
def _flag_one_pass(scan_path, out_path, band, run, band_source, progress):
    from concurrent.futures import ThreadPoolExecutor

    _check_run(run)
    chunk_dumps = int(run["chunk_dumps"])
    with open_scan(scan_path, run.get("layout")) as scan, _Scheduler(run) as sched:
        _check_band_matches(scan, band)
        with atomic_output(out_path) as tmp, h5py.File(tmp, "w") as f:
            _create_mask_file(f, scan, chunk_dumps)
            _write_attrs(f, band, band_source)
            flags = f["flags"]
            counts = np.zeros((scan.nchan, scan.nprod), dtype=np.int64)
            hist = np.zeros((scan.nprod, len(SK_EDGES) - 1), dtype=np.int64)
            pending = []

            def write(c0, c1, out):
                flags[c0:c1] = out
                counts[...] += (out != 0).sum(axis=0)

            with ThreadPoolExecutor(1, thread_name_prefix="rfisieve-write") as writer:
                def sink(c0, c1, res):
                    out, h = res["final"]
                    hist[...] += h
                    while pending and pending[0].done():
                        pending.pop(0).result()  # re-raise a failed write at once
                    pending.append(writer.submit(write, c0, c1, out))

                used = _run_detection(scan, list(DETECTORS), band, run, None, sched, progress, sink,
                                      grow=merge_halo(band))
                for fut in pending:
                    fut.result()
            _channel_cut_pass(flags, counts, scan.ntime, band["cuts"]["channel_limit"], chunk_dumps)
            _write_sk_diag(f, hist, used, band)
            _write_noise(f, used)


__all__ = ["plan_scan", "detect", "merge", "flag_scan", "detect_halo", "merge_halo", "noise_windows",
           "SIR_HALO", "DETECTORS"]

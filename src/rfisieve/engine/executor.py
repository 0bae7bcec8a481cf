"""The executor: windows of chunks read ahead and flagged as (chunk x product) tasks on
dask (threads, processes or a dask.distributed scheduler), within a memory budget.
"""

from functools import partial

import dask
import numpy as np

from rfisieve.engine.pages import MemoryBound
from rfisieve.engine.plan import (detect_halo, halo_span, noise_windows, reference_windows, segment_chunks,
                                  segment_of, split_at_gaps, window_span)
from rfisieve.engine.planes import (_assemble_groups, _detect_group, _flag_group, _meta, _noise_task,
                                    _planes, _prepare)
from rfisieve.errors import RfisieveError


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


#: Share of the machine's memory that the chunks in flight may use, in all: jobs that
#: run at the same time (``jobs``) divide it between them (:func:`memory_budget`).
MEMORY_SHARE = 0.25

#: Working bytes per sample of a chunk in work, beyond its stored samples: float32
#: values, masks, background, residual and its integer grid (measured: bench/throughput.py).
WORK_BYTES = 20


def memory_budget(jobs=1, total=None):
    """Bytes one job's chunks in flight may use: MEMORY_SHARE of the machine's memory
    (``total``, default: this machine's), divided between ``jobs`` jobs that run at once."""
    if total is None:
        import psutil

        total = psutil.virtual_memory().total
    return MEMORY_SHARE * total / max(1, int(jobs))


def chunk_cost(scan):
    """Bytes per dump of a chunk in work: its stored samples plus WORK_BYTES per sample."""
    itemsize = scan.dtype.itemsize + (1 if scan.has_flags else 0) + (4 if scan.has_s2 else 0)
    return scan.nchan * scan.nprod * (itemsize + WORK_BYTES)


def memory_advice(scan, chunk, halo, jobs=1, total=None):
    """None when a window of one chunk and the one read ahead fit in this job's share of
    memory; else the one-line advice (what is needed, what the share is, what to set)."""
    per_dump = chunk_cost(scan)
    rows = chunk + 2 * halo
    budget = memory_budget(jobs, total)
    need = 2 * rows * per_dump  # a window of at least one chunk and the one read ahead
    if need <= budget:
        return None
    total = budget * max(1, int(jobs)) / MEMORY_SHARE
    fit = int(budget // (2 * per_dump)) - 2 * halo  # the largest chunk_dumps that fits
    what = (f"set chunk_dumps to at most {fit}" if fit >= 1 else
            "even a chunk of one dump does not fit: run fewer jobs at once (fewer --cores, or more "
            "workers per job) or use a machine with more memory")
    gib = 2 ** 30
    return (f"{scan.path}: a chunk of {chunk} dumps + 2 x {halo} halo dumps, x {scan.nchan} channels x "
            f"{scan.nprod} products, needs ~{rows * per_dump / gib:.2f} GiB, twice that "
            f"(~{need / gib:.2f} GiB) with the next chunk read ahead; this job's share is "
            f"{budget / gib:.2f} GiB ({MEMORY_SHARE:.0%} of {total / gib:.1f} GiB, shared by {int(jobs)} "
            f"job{'s' if int(jobs) != 1 else ''} at once): {what}")


def _window_chunks(scan, chunk, halo, wanted, jobs=1):
    """Chunks per window: ``wanted``, fewer when this job's share of memory would not hold
    them (:func:`memory_budget`); a one-line RfisieveError with the advice when not even
    one chunk fits (:func:`memory_advice`)."""
    advice = memory_advice(scan, chunk, halo, jobs)
    if advice is not None:
        raise RfisieveError(advice)
    per_chunk = (chunk + 2 * halo) * chunk_cost(scan)
    return max(1, min(int(wanted), int(memory_budget(jobs) // (2 * per_chunk))))


def _noise_prepass(scan, band, meta, sched, what, segments):
    """Per-stretch, per-product SumThreshold noise sigma: the median over the pre-pass
    windows of each contiguous stretch (dump numbers counted from the stretch's start);
    and per stretch and product the reference bandpass shape of those windows
    (:func:`rfisieve.detect.bandpass.reference_of`; None when the persistence test is
    off).  Returns (sigmas, references)."""
    from rfisieve.detect.bandpass import reference_of

    st = band["sumthreshold"]
    shapes = bool(st.get("bandpass_dumps") and st.get("persist_dumps"))
    tasks, owner = [], []
    task = dask.delayed(partial(_noise_task, band=band, meta=meta))
    for k, (s, e) in enumerate(segments):
        # sigma on the noise windows; the reference's shapes (cheap: a quantile per
        # channel) on up to four windows, tiling a short stretch, so that an emitter on
        # in one of them does not make the reference
        sig_w = {tuple(w) for w in noise_windows(e - s)}
        ref_w = {tuple(w) for w in reference_windows(e - s)} if shapes else set()
        for a, b in sorted(sig_w | ref_w):
            block = scan.read(s + a, s + b, what)
            for p in range(scan.nprod):
                tasks.append(task(sched.put(_planes(block, 0, b - a, p)), p=p, t0=a,
                                  sigma=(a, b) in sig_w, shape=(a, b) in ref_w))
                owner.append((k, p))
    values = dask.compute(*tasks, **sched.kwargs)
    sigmas, refs = [], []
    for k in range(len(segments)):
        per_seg, ref_seg = [], []
        for p in range(scan.nprod):
            mine = [v for v, o in zip(values, owner) if o == (k, p)]
            row = np.array([v[0] for v in mine], dtype=np.float64)
            row = row[np.isfinite(row)]
            per_seg.append(float(np.median(row)) if row.size else 1.0)
            ref_seg.append(reference_of([v[1] for v in mine]))
        sigmas.append(per_seg)
        refs.append(ref_seg if any(r is not None for r in ref_seg) else None)
    return sigmas, refs


def run_windows(sched, chunks, ntime, halo, size, read, build, sink, progress=None, first=None,
                segments=None):
    """The one executor of every stage: windows of chunks, read ahead, computed on dask.

    Chunks go in windows of ``size`` chunks.  ``read(a, b)`` reads rows [a, b) of the
    scan (a window's chunks with ``halo`` dumps each side, clamped to the scan); it runs
    one window ahead in a reader thread.  ``build(block, base, c0, c1, a, b)`` returns the
    dask graph of chunk [c0, c1) whose halo rows [a, b) start at row ``a - base`` of the
    block; ``sink(c0, c1, result)`` takes each chunk's computed result in chunk order.
    ``first()``, when given, runs while the first window is being read.  With
    ``segments`` (contiguous stretches ``[start, stop)``) halos stop at the gaps between
    them (:func:`rfisieve.engine.plan.halo_span`); no chunk may straddle one.
    """
    from concurrent.futures import ThreadPoolExecutor

    windows = list(_windows(chunks, size))
    spans = [window_span(w, halo, ntime, segments) for w in windows]
    done = 0
    bound = MemoryBound()  # the memory kept for reuse stays flat over the windows
    with ThreadPoolExecutor(1, thread_name_prefix="rfisieve-read") as reader:
        ahead = reader.submit(read, *spans[0]) if windows else None
        if first is not None:
            first()
        for k, window in enumerate(windows):
            block = ahead.result()
            if k + 1 < len(windows):
                ahead = reader.submit(read, *spans[k + 1])
            base = spans[k][0]
            graph = [build(block, base, c0, c1, *halo_span(c0, c1, halo, ntime, segments)) for c0, c1 in window]
            results = dask.compute(*graph, **sched.kwargs)
            del block
            for (c0, c1), result in zip(window, results):
                sink(c0, c1, result)
                done += 1
                if progress:
                    progress(done, len(chunks))
            del results
            bound.window_done()


def _run_detection(scan, detectors, band, run, plan, sched, progress, sink, grow=None, jobs=1,
                   observe_data=None):
    """Run detectors over every chunk; ``sink(start, stop, results_by_detector)``.

    Chunks go in windows (:meth:`_Scheduler.window`, :func:`run_windows`): the driver reads
    each window's dumps (with halos) in one read, one window ahead in a reader thread,
    and sends each (chunk x product) plane to the dask scheduler.  With ``grow`` (the
    merge halo) each task runs both detectors and the merge (:func:`_flag_product`) on a
    halo widened by ``grow``, and ``sink`` gets ``{"final": (mask, hist)}``.  Each
    contiguous stretch of the scan (``scan.segments``) is flagged on its own: dump
    numbers count from its first dump, its noise is its own, halos stop at its ends.
    ``jobs`` is the number of such jobs running at once on this machine
    (:func:`_window_chunks`).  Returns the scan metadata used, including the pre-pass
    noise sigmas (``sigma``: per product, or per stretch and product when there are gaps).
    ``observe_data(start, block)`` sees each window's block as read (in the reader thread).
    """
    meta = _meta(scan, band)
    what = ["data", "flags"] + (["s2"] if scan.has_s2 else [])
    halo = plan["halo"] if plan else detect_halo(band, scan)
    if grow is not None:
        halo += grow
    segments = scan.segments
    chunks = split_at_gaps(plan["chunks"], segments) if plan else segment_chunks(
        segments, int(run["chunk_dumps"]))
    longest = max(c1 - c0 for c0, c1 in chunks)
    size = _window_chunks(scan, longest, halo, sched.window(len(meta["groups"])), jobs)
    names = ["final"] if grow is not None else list(detectors)
    prep_task = dask.delayed(partial(_prepare, meta=meta))
    # one task per group of products: a feed pair's two auto products together (their
    # SumThreshold detection combined), every other product alone
    groups = meta["groups"]
    tasks = {}  # stretch -> (flag task, detect task), band and meta bound once (dask
    #             would walk these nested dicts for every task)

    def noise():
        # the first window is read while the noise pre-pass runs
        sigmas, refs = [None] * len(segments), [None] * len(segments)
        if "sumthreshold" in detectors and band["sumthreshold"]["enabled"]:
            sigmas, refs = _noise_prepass(scan, band, meta, sched, what, segments)
            meta["sigma"] = sigmas[0] if len(segments) == 1 else sigmas
        for k, sig in enumerate(sigmas):
            m = meta if sig is None else dict(meta, sigma=sig, ref=refs[k])
            tasks[k] = (dask.delayed(partial(_flag_group, band=band, meta=m)),
                        dask.delayed(partial(_detect_group, band=band, meta=m)))

    def build(block, base, c0, c1, a, b):
        k = segments.index(list(segment_of(c0, segments)))
        flag_task, det_task = tasks[k]
        t0 = a - segments[k][0]  # dump numbers count from the stretch's first dump
        core = (c0 - a, c1 - a)
        if grow is not None:
            parts = [flag_task([sched.put(_planes(block, a - base, b - base, p)) for p in g], group=g,
                               t0=t0, core=core, grow=grow)
                     for g in groups]
            return [dask.delayed(_assemble_groups)(parts, groups, scan.nprod)]
        preps = [prep_task(sched.put(_planes(block, a - base, b - base, p)), p=p)
                 for p in range(scan.nprod)]
        return [dask.delayed(_assemble_groups)([det_task([preps[p] for p in g], group=g, detector=det, t0=t0,
                                                         core=core) for g in groups], groups, scan.nprod)
                for det in detectors]

    def read(a, b):
        block = scan.read(a, b, what)
        if observe_data is not None:
            observe_data(a, block)
        return block

    run_windows(sched, chunks, scan.ntime, halo, size, read, build,
                lambda c0, c1, per_det: sink(c0, c1, dict(zip(names, per_det))), progress, first=noise,
                segments=segments)
    return meta

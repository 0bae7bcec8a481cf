"""The executor: windows of chunks read ahead and flagged as (chunk x product) tasks on
dask (threads, processes or a dask.distributed scheduler), within a memory budget.
"""

from functools import partial

import dask
import numpy as np

from rfisieve.engine.plan import _chunks, detect_halo, halo_span, noise_windows
from rfisieve.engine.planes import (_assemble, _detect_product, _flag_product, _meta, _noise_task,
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
    spans = [halo_span(w[0][0], w[-1][1], halo, scan.ntime) for w in windows]
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
                a, b = halo_span(c0, c1, halo, scan.ntime)
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

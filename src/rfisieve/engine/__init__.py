"""The flagging engine: chunks of dumps with halos, (chunk x product) tasks on dask.

Layering: the engine reads scans through :mod:`rfisieve.io.scan`, calls the detectors
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
product) planes, at least one chunk) are in memory, never by the scan's length."""

import importlib

#: Public names and the module that holds each.  They are imported when first used
#: (PEP 562), so that importing one engine module (the workflow's night checks,
#: rfisieve.engine.night, when Snakemake reads the Snakefile) does not load dask and
#: the detectors' compiled kernels.
_WHERE = {"plan_scan": "plan", "detect_halo": "plan", "merge_halo": "plan", "noise_windows": "plan",
          "DETECTORS": "planes", "SK_EDGES": "planes", "detect": "stages", "flag_scan": "stages",
          "merge": "stages", "SIR_HALO": "plan"}


def __getattr__(name):
    if name in _WHERE:
        return getattr(importlib.import_module(f"rfisieve.engine.{_WHERE[name]}"), name)
    raise AttributeError(f"module 'rfisieve.engine' has no attribute {name!r}")


__all__ = ["plan_scan", "detect", "merge", "flag_scan", "detect_halo", "merge_halo", "noise_windows",
           "SIR_HALO", "DETECTORS"]

"""Ending a process as soon as its work is done (the workflow's jobs and Snakemake).

Python's own shutdown, after the program has returned, tears down every module and
collects every object.  With numba, dask, scipy and matplotlib loaded (a flag job or
the review) or Snakemake's planner (sqlalchemy, pydantic, its plugin registries) that
took 0.11-0.17 s per process, measured with a poll of /proc on the bench scans: time
on the night's critical path in which nothing is written.
"""

import atexit
import os
import sys


def end_process(rc):
    """End the process now with status ``rc``: the exit handlers (``atexit``, which
    include logging's flush and close and the clean-up of temporary directories) run
    and the output streams are flushed; Python's module teardown is skipped.  Callers
    have closed and renamed every output by then."""
    atexit._run_exitfuncs()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    os._exit(rc)


def exit_status(code):
    """The process exit status of a ``SystemExit`` code, as Python itself maps it
    (None is 0, an integer is itself, anything else is printed to stderr and is 1)."""
    if code is None:
        return 0
    if isinstance(code, int):
        return code & 0xFF
    print(code, file=sys.stderr)
    return 1

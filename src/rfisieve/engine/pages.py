"""Memory advice for the flagging engine's arrays: page size, and reuse of freed memory.

numpy asks the kernel for transparent huge pages (``madvise(MADV_HUGEPAGE)``) on every
array of 4 MiB or more.  On the virtual machines this project runs on, the first touch
of such memory costs six to seven times what ordinary pages cost: a fresh 72 MiB array
took 178-200 ms to fill with huge pages and 27-31 ms without (numpy 2.4, Linux with
transparent huge pages in ``madvise`` mode; 2026-12-01).  The engine allocates its
window blocks and per-plane arrays afresh for every window (arrays above glibc's
mmap threshold go back to the kernel when freed), so it pays that on every window:
flagging the 50 M-sample benchmark scan took 2.30-2.39 s with huge pages
(``NUMPY_MADVISE_HUGEPAGE=1``) and 2.20-2.25 s with this switch
(``bench/throughput.py --child flag``, four fresh runs each, interleaved).

:func:`small_pages` switches numpy's advice off while the engine runs and restores it
afterwards.  It leaves numpy alone when the user has set ``NUMPY_MADVISE_HUGEPAGE``
(numpy's own switch: 1 keeps huge pages, 0 turns them off for the whole process) and
when numpy does not offer the switch.  It acts in this process only (dask's
``processes`` workers keep numpy's default unless ``NUMPY_MADVISE_HUGEPAGE`` is set).

It also asks glibc to keep freed memory for reuse (:func:`keep_freed_memory`, once per
process): arrays up to 32 MiB come from the heap instead of a fresh ``mmap``, and the
heap is not trimmed when they are freed, so a window's planes reuse the pages of the
window before instead of faulting in new ones.  Flagging the 134 M-sample benchmark scan
in a fresh process (engine only, 2 threads): 8.53-9.33 s wall, 1.7-2.0 s of it in the
kernel, 540-750 thousand page faults with glibc's defaults; 8.20-8.60 s, 0.92-1.0 s in
the kernel, 360-375 thousand faults with these settings (fresh runs interleaved, three
with the defaults, eleven with the settings made here or as glibc's environment
variables; 2026-12-03).  The price: the process holds on to its peak memory until it
exits (a flag job exits when its scans are done), and memory kept for reuse fragments, so
the executor bounds it (:class:`MemoryBound`: freed memory goes back to the system when a
window ends more than 4 % above the scan's first windows).  It leaves glibc alone when the user
has set one of its own switches (``MALLOC_MMAP_THRESHOLD_``, ``MALLOC_TRIM_THRESHOLD_``,
``MALLOC_TOP_PAD_``), and off glibc.  Like the huge-page switch it acts in the engine's
own process (the threads scheduler, the default); dask's ``processes`` and distributed
workers keep glibc's defaults unless those variables are set for them.
"""

import functools
import os

__all__ = ["small_pages", "keep_freed_memory", "MemoryBound"]

# mallopt(3) parameters (glibc's malloc.h)
_M_TRIM_THRESHOLD, _M_TOP_PAD, _M_MMAP_THRESHOLD = -1, -2, -3
_MIB = 2 ** 20
#: glibc's settings while flagging: the largest mmap threshold glibc accepts on 64-bit
#: systems (32 MiB), a trim threshold the heap never reaches, 64 MiB grown at a time
GLIBC_SETTINGS = {_M_MMAP_THRESHOLD: 32 * _MIB, _M_TRIM_THRESHOLD: 2 ** 31 - 1, _M_TOP_PAD: 64 * _MIB}
_GLIBC_SWITCHES = ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_", "MALLOC_TOP_PAD_")
_kept = []  # the settings made in this process (empty until keep_freed_memory acts)
_glibc = []  # glibc, as keep_freed_memory found it (for MemoryBound's trim)


def keep_freed_memory():
    """Ask glibc's malloc to keep freed memory for reuse (see the module), once per
    process.  Returns True when the settings are in force (made now or before)."""
    if _kept:
        return True
    if any(k in os.environ for k in _GLIBC_SWITCHES):
        return False
    try:
        import ctypes

        libc = ctypes.CDLL(None)
        mallopt = libc.mallopt
        libc.gnu_get_libc_version  # glibc only (musl has no mallopt parameters of these)
    except (OSError, AttributeError):  # pragma: no cover - not glibc
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    _kept.extend(k for k, v in GLIBC_SETTINGS.items() if mallopt(k, v) == 1)
    _glibc[:] = [libc]
    return bool(_kept)


def _resident():
    """This process's resident memory in bytes (None where /proc is not there)."""
    try:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return None


class MemoryBound:
    """Keeps the memory glibc holds (:func:`keep_freed_memory`) flat over a long scan.

    Memory kept for reuse fragments: on a 335 M-sample scan (20 windows) the resident
    size crept from 1152 to 1281 MiB, window after window, where glibc's defaults level
    off after the second window.  So the resident size at the end of a scan's first
    :attr:`REFERENCE` windows is taken as its working size, and when a later window
    ends more than :attr:`BOUND` above it, the freed memory goes back to the system
    (``malloc_trim``); the next windows fault in what they need again.  One per scan:
    call :meth:`window_done` after each window."""

    REFERENCE = 2
    BOUND = 1.04

    def __init__(self):
        self.windows, self.reference, self.trims = 0, 0, 0

    def window_done(self):
        if not _kept:
            return
        rss = _resident()
        if rss is None:
            return
        self.windows += 1
        if self.windows <= self.REFERENCE:
            self.reference = max(self.reference, rss)
        elif rss > self.BOUND * self.reference:
            _glibc[0].malloc_trim(0)
            self.trims += 1


def _setter():
    if "NUMPY_MADVISE_HUGEPAGE" in os.environ:
        return None
    try:
        from numpy._core import multiarray
    except ImportError:  # pragma: no cover - numpy < 2
        return None
    return getattr(multiarray, "_set_madvise_hugepage", None)


def small_pages(fn):
    """Decorator: run ``fn`` with numpy's huge-page advice off, and glibc keeping freed
    memory (see the module)."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        keep_freed_memory()
        setter = _setter()
        if setter is None:
            return fn(*args, **kwargs)
        previous = setter(False)
        try:
            return fn(*args, **kwargs)
        finally:
            setter(previous)
    return wrapper

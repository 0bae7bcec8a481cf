"""Page-size advice for the flagging engine's arrays.

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
"""

import functools
import os

__all__ = ["small_pages"]


def _setter():
    if "NUMPY_MADVISE_HUGEPAGE" in os.environ:
        return None
    try:
        from numpy._core import multiarray
    except ImportError:  # pragma: no cover - numpy < 2
        return None
    return getattr(multiarray, "_set_madvise_hugepage", None)


def small_pages(fn):
    """Decorator: run ``fn`` with numpy's huge-page advice off (see the module)."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        setter = _setter()
        if setter is None:
            return fn(*args, **kwargs)
        previous = setter(False)
        try:
            return fn(*args, **kwargs)
        finally:
            setter(previous)
    return wrapper

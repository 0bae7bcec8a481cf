"""rfisieve.engine.pages: numpy's huge-page advice is off while the engine runs, restored after,
and left alone when the user set NUMPY_MADVISE_HUGEPAGE; glibc keeps freed memory for reuse,
unless the user set one of its own switches."""

import pytest
from numpy._core import multiarray

from rfisieve.engine.pages import small_pages


def _current():
    prev = multiarray._set_madvise_hugepage(True)   # returns the setting it replaces
    multiarray._set_madvise_hugepage(prev)
    return prev


def test_off_inside_restored_after(monkeypatch):
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    seen = []
    f = small_pages(lambda: seen.append(_current()))
    for before in (True, False):
        multiarray._set_madvise_hugepage(before)
        f()
        assert seen[-1] is False
        assert _current() is before


def test_restored_after_an_error(monkeypatch):
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    multiarray._set_madvise_hugepage(True)

    @small_pages
    def fails():
        raise RuntimeError("x")

    with pytest.raises(RuntimeError):
        fails()
    assert _current() is True


def test_user_setting_wins(monkeypatch):
    monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", "1")
    multiarray._set_madvise_hugepage(True)
    seen = []
    small_pages(lambda: seen.append(_current()))()
    assert seen == [True]


# keep_freed_memory acts once per process: each case runs in a fresh interpreter.
_PROBE = """
import resource, numpy as np
from rfisieve.engine.pages import keep_freed_memory
on = keep_freed_memory()
a = np.ones(3 * 2**20); del a          # 24 MiB, touched and freed
f0 = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
b = np.ones(3 * 2**20)                 # the same size again
print(on, keep_freed_memory(), resource.getrusage(resource.RUSAGE_SELF).ru_minflt - f0)
"""


def _probe(env_extra):
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    env.update(NUMPY_MADVISE_HUGEPAGE="0", **env_extra)  # 4 KiB pages: faults count pages
    out = subprocess.run([sys.executable, "-c", _PROBE], env=env, capture_output=True, text=True, check=True)
    on, again, faults = out.stdout.split()
    return on == "True", again == "True", int(faults)


@pytest.mark.skipif(not __import__("sys").platform.startswith("linux"), reason="glibc's malloc")
def test_freed_memory_is_reused_without_new_page_faults():
    # Check value, glibc's mallopt(3) (from memory): an M_MMAP_THRESHOLD of up to 32 MiB
    # on 64-bit systems puts a 24 MiB block on the heap, and M_TRIM_THRESHOLD keeps the
    # heap's top when it is freed; so the second array reuses the first one's 6144 pages
    # of 4 KiB.  With a fresh mmap each time it would fault all of them in again.
    on, again, faults = _probe({})
    assert on and again
    assert faults < 6144 // 10


def test_the_users_glibc_setting_wins():
    on, _, faults = _probe({"MALLOC_TRIM_THRESHOLD_": "131072"})
    assert not on
    # and the probe does see fresh pages when glibc is left to the user's setting (a
    # fixed 128 KiB mmap threshold: each 24 MiB array is a fresh mapping)
    assert faults > 6144 // 2


_CREEP = """
import numpy as np
from rfisieve.engine.pages import MemoryBound, _resident, keep_freed_memory
keep_freed_memory()
bound = MemoryBound()
for _ in range(bound.REFERENCE):
    bound.window_done()                      # the reference: the resident size now
small = bound.trims
held = [np.ones(2**17) for _ in range(200)]  # 200 MiB in 1 MiB arrays, from the heap
del held                                     # freed, and kept by glibc
kept = _resident()
bound.window_done()
print(small, bound.trims, kept // 2**20, _resident() // 2**20)
"""


@pytest.mark.skipif(not __import__("sys").platform.startswith("linux"), reason="glibc's malloc")
def test_memory_kept_for_reuse_goes_back_when_it_grows_past_the_bound():
    # Check value, glibc's malloc_trim(3) (from memory): it gives the free memory of every
    # arena back to the system, so the 200 MiB freed but kept must leave the resident set.
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    out = subprocess.run([sys.executable, "-c", _CREEP], env=env, capture_output=True, text=True, check=True)
    before, after, kept_mib, now_mib = map(int, out.stdout.split())
    assert (before, after) == (0, 1)
    assert kept_mib - now_mib > 150

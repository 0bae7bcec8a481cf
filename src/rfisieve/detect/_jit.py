"""numba for rfisieve's compiled kernels.

Every kernel module takes ``njit`` from here: it is ``numba.njit`` itself, imported
after numba's array-math registry has been loaded without its BLAS probe.

numba imports ``numba.np.arraymath`` when it first compiles or loads a cached function,
and that module imports ``scipy.linalg`` to learn whether a BLAS is there for
``np.dot`` and its kin (some of which numba then registers).  That import costs about
0.18 s of every process on the development machine, hence of every Snakemake job
(``python -X importtime``, 2026-12-01).  rfisieve's kernels use no BLAS (no
``np.dot``, ``np.linalg``, ``np.cov``), so the probe is answered "no BLAS": while
numba's registry loads, ``scipy.linalg`` is hidden, unless it is loaded already (then
nothing is done and numba finds it).  A process that imports ``scipy.linalg`` later gets
it as usual; only numba-compiled linear algebra in the same process would be missing.
"""

import sys

from numba import njit

__all__ = ["njit"]


def _load_registry_without_blas_probe():
    if "numba.np.arraymath" in sys.modules or "scipy.linalg" in sys.modules:
        return
    sys.modules["scipy.linalg"] = None          # import scipy.linalg raises ImportError
    try:
        import numba.np.arraymath  # noqa: F401
    finally:
        if "scipy.linalg" in sys.modules and sys.modules["scipy.linalg"] is None:
            del sys.modules["scipy.linalg"]


_load_registry_without_blas_probe()

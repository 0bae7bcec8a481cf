"""rfisieve.detect._jit: numba's registry is loaded without the scipy.linalg import, and
scipy.linalg still works afterwards in the same process."""

import subprocess
import sys

CODE = """
import sys
import numpy as np
from rfisieve.detect import _sumthreshold_kernels as kernels
assert 'scipy.linalg' not in sys.modules, 'the BLAS probe imported scipy.linalg'
x = np.zeros((3, 4), np.float32); out = np.empty((3, 4), np.int32)
kernels.to_grid(x, 1.0, -1.0, 1.0, out)                  # a kernel loads and runs
import scipy.linalg                                      # and scipy.linalg is intact
assert np.allclose(scipy.linalg.solve(np.eye(2) * 2, np.ones(2)), 0.5)
print('ok')
"""


def test_registry_loads_without_scipy_linalg_and_leaves_it_importable():
    res = subprocess.run([sys.executable, "-c", CODE], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "ok"

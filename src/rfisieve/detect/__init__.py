"""Detectors: pure functions of numpy arrays (no files, configs, dask or Snakemake).

Each public module is paired with its compiled kernels (``_*kernels.py``, numba, taking
``njit`` from :mod:`._jit`): :mod:`.kurtosis` (spectral kurtosis), :mod:`.background`
and :mod:`.sumthreshold`, :mod:`.growth` (SIR operator), :mod:`.masks` (mask helpers).
"""

"""Band settings: the defaults every band config starts from, and how they are merged.

A band config (``config/bands/<band>.yaml``) holds only what differs from these
defaults; :func:`band_settings` returns the full, merged dictionary that the engine
and the detectors' callers use.  The JSON schema in ``workflow/schemas/band.schema.yaml``
describes the same keys; keep the two in step.
"""

import copy

#: Defaults for every band.  Units are in the key names or comments.
BAND_DEFAULTS = {
    "band": None,            # band name, as in the scan's ``band`` attribute
    "description": "",
    "kurtosis": {
        "enabled": True,
        "sigma": 3.5,        # thresholds where a Gaussian would hold norm.sf(sigma) per tail
        "pfa": None,         # per-tail false-alarm probability; overrides sigma when set
        "method": "auto",    # threshold method passed to sk_thresholds (see rfisieve.detect.kurtosis)
        "block_dumps": 16,   # M of the block estimator, used when the scan has no /s2
    },
    "sumthreshold": {
        "enabled": True,
        "chi1": 8.0,             # first threshold chi_1, in robust noise sigma
        "rho": 1.5,              # window threshold ratio: chi_M = chi_1 / rho**log2(M)
        "max_window_time": 32,   # largest window along time, dumps (a power of two)
        "max_window_freq": 128,  # largest window along frequency, channels (power of two)
        "iterations": 3,         # background fits; the threshold is lowered step by step
        "start_scale": 4.0,      # threshold factor of the first iteration, falling to 1
        "background_time": 15.0, # smoothing scale of the background along time, dumps
        "background_freq": 5.0,  # smoothing scale of the background along frequency, channels
        "bandpass_dumps": 0,     # dumps per block of the median bandpass divided out first (0 = off;
                                 # on in the L band, measured there: see config/bands/L.yaml)
        "persist_dumps": 0,      # longest block of the persistence test, dumps (0 = off)
        "persist_sigma": 6.0,    # persistence threshold, sigma of a block mean
        "baseline_channels": 64, # half-width of the running median over channels, channels
        "compact_sigma": 0.0,    # compact-box threshold, sigma of a normalised box sum (0 = off)
    },
    "growth": {
        "enabled": True,
        "eta": 0.1,              # SIR aggressiveness eta (0 = no growth, 1 = flag all)
        "time": True,            # grow along time
        "freq": True,            # grow along frequency
        "reach_time": 16,        # longest reach of a growth interval to either side, dumps
        "reach_freq": 4,         # longest reach of a growth interval to either side, channels
    },
    "cuts": {
        "channel_limit": 0.8,    # flag a whole channel of a product above this fraction
        "dump_limit": 0.8,       # flag a whole dump of a product above this fraction
    },
    "protect": [],               # [{start_mhz, stop_mhz, reason, source}] protected sky lines
    "known_bad": [],             # [{start_mhz, stop_mhz, reason}] known-bad ranges
    "emitters": [],              # [{name, start_mhz, stop_mhz, source}] site emitters
}

#: Defaults of the run config (config/config.yaml); the top-level key names
#: inputs, outdir, chunk_dumps and workers are a contract (DESIGN.md 2.4).
RUN_DEFAULTS = {
    "inputs": [],
    "outdir": "results",
    "chunk_dumps": 4096,
    "workers": 2,
    "scheduler": "threads",      # threads | processes | synchronous | tcp://host:port
    "bands_dir": "config/bands",
    "previous_run": None,        # a previous run.csv to compare occupancy with
    "layout": {
        "data": "/data",
        "time": "/time",
        "freq": "/freq",
        "products": "/products",
        "flags": "/flags",
        "s2": "/s2",
        "axes": ["time", "freq", "product"],  # axis order of data, flags and s2
    },
}


def merge(defaults, override):
    """Return ``defaults`` updated recursively with ``override`` (neither is changed)."""
    out = copy.deepcopy(defaults)
    for key, value in (override or {}).items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def band_settings(override=None):
    """Full band settings: :data:`BAND_DEFAULTS` updated with a band config's values."""
    return merge(BAND_DEFAULTS, override)


def run_settings(override=None):
    """Full run settings: :data:`RUN_DEFAULTS` updated with a run config's values."""
    return merge(RUN_DEFAULTS, override)

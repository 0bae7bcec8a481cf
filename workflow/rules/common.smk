# Helpers of the rfisieve workflow: run settings, the scan table, per-scan paths.
# Only lookups live here; all work is done by `rfisieve` subcommands in the rules.

import json
import os
import re
import shlex
import sys

from rfisieve.config import load as rfconfig
from rfisieve.io import scan as rfio
from rfisieve.config.defaults import run_settings

# `config` was validated by the Snakefile; fill in the defaults of keys it leaves out.
RUN = run_settings(config)
OUTDIR = RUN["outdir"].rstrip("/") or "."
WORKERS = int(RUN["workers"])
LOCAL_DASK = not RUN["scheduler"].startswith("tcp://")
# Workers of a dask.distributed cluster do not run on Snakemake's cores.
DASK_THREADS = WORKERS if LOCAL_DASK else 1
# Detect jobs that run at once on one machine (--cores // threads per job): they share
# its memory budget. On a cluster each job has its node (its own memory request).
try:
    JOBS_AT_ONCE = max(1, int(workflow.cores) // DASK_THREADS) if workflow.local_exec else 1
except Exception:  # no --cores (e.g. a dry run): one job's view
    JOBS_AT_ONCE = 1

# scan name -> path, scan name -> band (read from the files' `band` attribute).
SCANS = {rfio.scan_name(p): p for p in rfconfig.expand_inputs(RUN["inputs"], source="inputs")}
BANDS = {scan: rfio.scan_band(path, RUN["layout"]) for scan, path in SCANS.items()}
# Every band seen needs a valid config (one-line ConfigError before any job starts).
for _band in sorted(set(BANDS.values())):
    rfconfig.load_band(RUN["bands_dir"], _band)

# Run settings that change results go into params (a change re-runs the jobs);
# workers and scheduler only change the speed: the detect rules read them from RUN
# when a job starts, so that changing them re-runs nothing.
RUN_SETS = "--set chunk_dumps={} --set layout={}".format(
    RUN["chunk_dumps"], shlex.quote(json.dumps(RUN["layout"], separators=(",", ":")))
)

# The `rfisieve` of this Python environment, found even when its bin/ is not on PATH.
_script = os.path.join(os.path.dirname(sys.executable), "rfisieve")
RFISIEVE = shlex.quote(_script) if os.access(_script, os.X_OK) else "rfisieve"


wildcard_constraints:
    scan="|".join(re.escape(s) for s in SCANS) or "(?!)",


def scan_path(wildcards):
    return SCANS[wildcards.scan]


def band_config(wildcards):
    """Band config of the scan's band: an input, so editing it re-flags that band only."""
    return rfconfig.band_config_path(RUN["bands_dir"], BANDS[wildcards.scan])


def out(*parts):
    return os.path.join(OUTDIR, *parts)


def log(stage, name="{scan}"):
    return out("logs", stage, f"{name}.log")


def bench(stage, name="{scan}"):
    return out("benchmarks", stage, f"{name}.tsv")


def all_outputs():
    return (
        expand(out("flags", "{scan}.h5"), scan=SCANS)
        + expand(out("occupancy", "{scan}.{ext}"), scan=SCANS, ext=("csv", "h5"))
        + [out("occupancy", "run.csv"), out("report", "index.html")]
    )

# Helpers of the rfisieve workflow: run settings, the night's checks, the scan table,
# the flag jobs.  Only lookups live here; all work is done by `rfisieve` subcommands.

import json
import os
import re
import shlex
import sys

from rfisieve.config import load as rfconfig
from rfisieve.config.defaults import run_settings
from rfisieve.engine import night as rfnight

# `config` was validated by the Snakefile; fill in the defaults of keys it leaves out.
RUN = run_settings(config)
for _key in ("strict", "keep_partial"):  # --config key=true arrives as a string
    RUN[_key] = RUN[_key] is True or str(RUN[_key]).lower() == "true"
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

# The night's checks, once, in this process: every scan opened read-only and validated,
# every band config loaded once.  A bad scan is quarantined (its job records why and the
# night goes on); with `strict: true` the first problem stops the night here.
NIGHT = rfnight.check_night(rfconfig.expand_inputs(RUN["inputs"], source="inputs"), RUN,
                            strict=bool(RUN["strict"]))
SCANS = {scan: e["path"] for scan, e in NIGHT.items()}

# Provenance decides what is redone: a scan whose record or mask no longer matches the
# scan file, its band config's contents or this package's version loses its record, so
# its job runs again (whatever the files' mtimes, with or without .snakemake).  Snakemake
# does not tell a Snakefile whether it is a dry run; its command line does (a dry run
# removes nothing; the params below still show a changed band config's jobs).
_DRY = any(a in ("--dry-run", "--dryrun", "--touch", "--summary", "--detailed-summary", "--list-changes")
           or re.fullmatch(r"-[a-zA-Z]*[nt][a-zA-Z]*", a) for a in sys.argv[1:])
if workflow.is_main_process:
    for _scan, _why in sorted(rfnight.expire_stale(NIGHT, OUTDIR, RUN, remove=not _DRY).items()):
        print(f"rfisieve: scan {_scan} is flagged again: {_why}", file=sys.stderr)

# The flag jobs: scans of one band share a job (one process start-up) up to
# batch_samples samples; each job flags its scans one after the other.
# Small scans (one chunk each) go into jobs of a dozen, one core each, flagged side by
# side (rfnight.batches).
BATCHES = rfnight.batches(NIGHT, int(RUN["batch_samples"]), small_dumps=int(RUN["chunk_dumps"]))


def batch_threads(scans):
    """Cores a flag job reserves: its dask workers, or one for a job of small scans."""
    return rfnight.batch_threads(NIGHT, scans, DASK_THREADS, int(RUN["chunk_dumps"]))

# Run settings that change results go into params (a change re-runs the jobs);
# workers and scheduler only change the speed: the flag rule reads them from RUN
# when a job starts, so that changing them re-runs nothing.
RUN_SETS = "--set chunk_dumps={} --set layout={} --set bands_dir={}".format(
    RUN["chunk_dumps"], shlex.quote(json.dumps(RUN["layout"], separators=(",", ":"))),
    shlex.quote(json.dumps(RUN["bands_dir"])))
FLAG_OPTIONS = " ".join(o for o, on in (("--keep-partial", RUN["keep_partial"]),
                                        ("--strict", RUN["strict"])) if on)

# The `rfisieve` of this Python environment, found even when its bin/ is not on PATH.
_script = os.path.join(os.path.dirname(sys.executable), "rfisieve")
RFISIEVE = shlex.quote(_script) if os.access(_script, os.X_OK) else "rfisieve"


def out(*parts):
    return os.path.join(OUTDIR, *parts)


def log(stage, name="{scan}"):
    return out("logs", stage, f"{name}.log")


def bench(stage, name="{scan}"):
    return out("benchmarks", stage, f"{name}.tsv")


def batch_name(scans):
    """Name of a flag job's log and benchmark: its scan, or first..last scan."""
    return scans[0] if len(scans) == 1 else f"{scans[0]}..{scans[-1]}"


def band_configs(scans):
    """Band config files of these scans (inputs: editing one re-flags that band only)."""
    return sorted({NIGHT[s]["band_path"] for s in scans if NIGHT[s]["band_path"]})


def expect(scans):
    """The night's plan of these scans (shape, identity, settings digest): a param, so
    a changed scan or band config re-runs the job, and the job checks the file it
    reads against it (a scan grown or replaced since is not flagged with a stale plan)."""
    plan = {s: {k: NIGHT[s][k] for k in ("shape", "identity", "settings")} for s in scans}
    return json.dumps(plan, sort_keys=True, separators=(",", ":"))


def record(scan):
    return out("scans", f"{scan}.json")


def all_outputs():
    return [record(s) for s in SCANS] + [
        out("occupancy", "run.csv"), out("report", "index.html"), out("failed_scans.csv"),
        out("logs", "verdict", "run.ok")]

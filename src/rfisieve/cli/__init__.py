"""The ``rfisieve`` command: one entry point, one subcommand per job.

Subcommands written here: ``run`` (the whole workflow through Snakemake), ``inspect``,
``thresholds`` and the stage commands the workflow rules call (``plan``, ``detect``,
``merge``).  Other modules add theirs through ``register_cli(subparsers)``; they are
imported only when the parser is built, and one that fails to import is an error
(:class:`PluginImportError`): a broken install must not look like a missing command.  Heavy libraries (numpy, h5py, dask) are
imported inside the commands so that ``rfisieve --help`` stays fast.
"""

import argparse
import contextlib
import importlib
import json
import os
import sys
import time

from rfisieve import __version__
from rfisieve.errors import ConfigError, RfisieveError
from rfisieve.commands import add_command, add_options

#: Modules that add their own subcommands with ``register_cli(subparsers)``.
PLUGIN_MODULES = ("rfisieve.sim.scans", "rfisieve.review.occupancy", "rfisieve.review.page",
                  "rfisieve.evaluate.score", "rfisieve.evaluate.tune")

DESCRIPTION = """\
Flag radio-frequency interference (RFI) in time-frequency scan files (HDF5 dynamic
spectra of auto- and cross-correlation products), one mask file per scan, and
summarise per-channel occupancy for the morning review.

Most users need `rfisieve run` (flag a whole observing run through the Snakemake
workflow), `rfisieve inspect` (what is in a scan file) and `rfisieve thresholds`
(spectral-kurtosis thresholds for an accumulation length). The stage commands
plan / detect / merge are what the workflow rules call, one scan at a time.
"""


class _Formatter(argparse.HelpFormatter):
    """Wrapped help that shows a default only where there is one worth showing."""

    def _get_help_string(self, action):
        text = action.help or ""
        if (action.option_strings and "%(default)" not in text and "default:" not in text
                and action.default not in (None, False, [], argparse.SUPPRESS)):
            text += " (default: %(default)s)"
        return text


class _TopFormatter(argparse.RawDescriptionHelpFormatter, _Formatter):
    pass


class PluginImportError(RfisieveError):
    """A module that adds subcommands cannot be imported (a broken installation)."""


#: The run-config option: one name in every subcommand.  ``--config-file`` (the name
#: ``run`` once had) is still accepted, hidden from the help.
RUN_CONFIG_HELP = "run config YAML (keys as in config/config.yaml)"


def add_run_config_option(p, default_text="built-in defaults"):
    """Add ``--run-config FILE`` (and the hidden alias ``--config-file``) to parser ``p``."""
    p.add_argument("--run-config", dest="run_config", metavar="FILE",
                   help=f"{RUN_CONFIG_HELP}; default: {default_text}")
    p.add_argument("--config-file", dest="run_config", help=argparse.SUPPRESS)


# -- shared options ------------------------------------------------------------
def _add_run_options(p):
    g = p.add_argument_group("run settings (defaults: rfisieve.config.defaults.RUN_DEFAULTS)")
    add_run_config_option(g)
    g.add_argument("--set", dest="sets", action="append", default=[], metavar="KEY=VALUE",
                   help="override one run-config key, value in YAML; dotted keys reach into "
                        "layout, e.g. --set chunk_dumps=512 --set layout.data=/vis (repeatable)")


def _add_parallel_options(p):
    p.add_argument("--workers", type=int, metavar="N",
                   help="dask workers for the chunks of this scan (overrides the run config)")
    p.add_argument("--scheduler", metavar="S",
                   help="threads | processes | synchronous | tcp://host:port of a dask.distributed "
                        "scheduler (overrides the run config)")
    p.add_argument("--jobs-at-once", type=int, default=1, metavar="J",
                   help="jobs like this one that run at the same time on this machine: they share its "
                        "memory budget (25 %% of the memory, divided by J); the workflow passes "
                        "--cores // workers")


def _run_settings(args):
    from rfisieve.config import load as config

    overrides = config.parse_set(args.sets)
    for key in ("workers", "scheduler"):
        value = getattr(args, key, None)
        if value is not None:
            overrides[key] = value
    return config.load_run_config(args.run_config, overrides)


def _band_settings(args, scan_path, run):
    """Band settings from --band-config, or the scan's band in the run's bands_dir."""
    from rfisieve.config import load as config
    from rfisieve.io import scan as io

    band = io.scan_band(scan_path, run.get("layout"))
    if args.band_config:
        return config.load_band_file(args.band_config, band)
    return config.load_band(run["bands_dir"], band)


def _add_stage(sub, name, func, help, description):
    """A stage subcommand: SCAN, --band-config and the run-settings options."""
    p = sub.add_parser(name, formatter_class=_Formatter, help=help, description=description)
    p.add_argument("scan", metavar="SCAN", help="scan file (HDF5)")
    p.add_argument("--band-config", metavar="FILE",
                   help="band config YAML of the scan's band (default: <bands_dir>/<band>.yaml "
                        "from the run settings)")
    _add_run_options(p)
    p.set_defaults(func=func)
    return p


class _Progress:
    """Progress lines on stderr: at most about every 10 %% (and always the last)."""

    def __init__(self, label):
        self.label = label
        self.last = -1
        self.t0 = time.monotonic()

    def __call__(self, done, total):
        step = int(10 * done / max(total, 1))
        if step > self.last or done == total:
            self.last = step
            dt = time.monotonic() - self.t0
            print(f"{self.label}: {done}/{total} chunks, {dt:.1f} s", file=sys.stderr, flush=True)


# -- stage commands ------------------------------------------------------------
def cmd_plan(args):
    from rfisieve import engine
    from rfisieve.io import scan as io

    run = _run_settings(args)
    band, _ = _band_settings(args, args.scan, run)
    plan = engine.plan_scan(args.scan, band, run)
    text = json.dumps(plan, indent=1) + "\n"
    if args.out in (None, "-"):
        sys.stdout.write(text)
        return 0
    with io.atomic_output(args.out) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
    return 0


def _read_plan(path):
    if not path:
        return None
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except (OSError, ValueError) as err:
        raise RfisieveError(f"{path}: cannot read the plan ({err}); rerun `rfisieve plan`") from None


def cmd_detect(args):
    from rfisieve import engine

    run = _run_settings(args)
    band, _ = _band_settings(args, args.scan, run)
    plan = _read_plan(args.plan)
    if args.jobs_at_once < 1:
        raise ConfigError("--jobs-at-once", f"{args.jobs_at_once}: expected a whole number >= 1")
    engine.detect(args.scan, args.out, args.detector, band, run, plan=plan, jobs=args.jobs_at_once,
                  progress=_Progress(f"detect {args.detector} {os.path.basename(args.scan)}"))
    return 0


def cmd_merge(args):
    from rfisieve import engine

    run = _run_settings(args)
    band, source = _band_settings(args, args.scan, run)
    engine.merge(args.scan, args.partial, args.out, band, run, band_source=source,
                 progress=_Progress(f"merge {os.path.basename(args.scan)}"))
    return 0


# -- inspect -------------------------------------------------------------------
def _utc(t):
    from rfisieve.textfmt import utc_iso

    return utc_iso(t)


def _upstream_fraction(scan, step=1024):
    if not scan.has_flags:
        return None
    flagged = 0
    for start in range(0, scan.ntime, step):
        flagged += int(scan.read(start, start + step, what=("flags",))["flags"].sum())
    return flagged / (scan.ntime * scan.nchan * scan.nprod)


def _products_text(names, limit=6):
    if not names:
        return "none"
    shown = ", ".join(names[:limit])
    return f"{len(names)} ({shown}{', ...' if len(names) > limit else ''})"


def scan_facts(path, layout=None):
    """What a scan file holds, as plain numbers and strings (``rfisieve inspect --json``).

    Keys: ``file``, ``band``, ``ntime``, ``nchan``, ``nprod``, ``dtype``, ``complex``,
    ``auto_products``, ``cross_products`` (lists), ``time_start_utc``, ``time_stop_utc``
    (ISO 8601), ``time_start_s``, ``time_stop_s`` (seconds since 1970 UTC),
    ``duration_s``, ``integration_time_s``, ``gaps`` (list of ``{after_dump, seconds}``,
    where detection does not run across), ``freq_min_hz``, ``freq_max_hz``,
    ``channel_width_hz``, ``accumulations``, ``presum``, ``d``,
    ``upstream_flagged_fraction`` (null without ``/flags``), ``has_s2``.
    """
    from rfisieve.io import scan as io

    with io.open_scan(path, layout) as scan:
        t0, t1 = float(scan.time.min()), float(scan.time.max())
        return {
            "file": str(path),
            "band": scan.band,
            "ntime": scan.ntime,
            "nchan": scan.nchan,
            "nprod": scan.nprod,
            "dtype": str(scan.dtype),
            "complex": bool(scan.is_complex),
            "auto_products": [p for p, a in zip(scan.products, scan.autos) if a],
            "cross_products": [p for p, a in zip(scan.products, scan.autos) if not a],
            "time_start_utc": _utc(t0),
            "time_stop_utc": _utc(t1),
            "time_start_s": t0,
            "time_stop_s": t1,
            "duration_s": t1 - t0,
            "integration_time_s": float(scan.integration_time),
            "gaps": [{"after_dump": int(i), "seconds": float(sec)} for i, sec in scan.gaps],
            "freq_min_hz": float(scan.freq.min()),
            "freq_max_hz": float(scan.freq.max()),
            "channel_width_hz": float(scan.channel_width),
            "accumulations": int(scan.accumulations),
            "presum": int(scan.presum),
            "d": float(scan.d),
            "upstream_flagged_fraction": _upstream_fraction(scan),
            "has_s2": bool(scan.has_s2),
        }


def inspect_scan(path, layout=None):
    """Summary of one scan file as a dict of printable values (see ``rfisieve inspect``)."""
    f = scan_facts(path, layout)
    frac = f["upstream_flagged_fraction"]
    gaps = f["gaps"]
    return {
        "file": f["file"],
        "shape (time, chan, prod)": f"{f['ntime']} x {f['nchan']} x {f['nprod']}",
        "dtype": f"{f['dtype']} ({'complex visibilities, amplitude used' if f['complex'] else 'real power'})",
        "band": f["band"],
        "auto products": _products_text(f["auto_products"]),
        "cross products": _products_text(f["cross_products"]),
        "time span (UTC)": f"{f['time_start_utc']} to {f['time_stop_utc']} ({f['duration_s'] / 60:.1f} min)",
        "time gaps": "none" if not gaps else "; ".join(
            f"{g['seconds']:g} s after dump {g['after_dump']}" for g in gaps[:4]) + (
            f"; ... ({len(gaps)} in all)" if len(gaps) > 4 else "") + ": each stretch is flagged alone",
        "integration time": f"{f['integration_time_s']:g} s per dump",
        "frequency range": f"{f['freq_min_hz'] / 1e6:.4f} to {f['freq_max_hz'] / 1e6:.4f} MHz (channel centres)",
        "channel width": f"{f['channel_width_hz'] / 1e3:g} kHz",
        "accumulations": f"{f['accumulations']} raw spectra per dump (presum N = {f['presum']}, d = {f['d']:g})",
        "upstream flags": "none (no /flags dataset)" if frac is None else f"{100 * frac:.3f} % flagged",
        "/s2 (sum of squared powers)": "present: SK per dump" if f["has_s2"] else "absent: SK over blocks of dumps",
    }


def cmd_inspect(args):
    run = _run_settings(args)
    status = 0
    for i, path in enumerate(args.scans):
        try:
            info = (scan_facts if args.json else inspect_scan)(path, run.get("layout"))
        except RfisieveError as err:
            print(f"rfisieve: error: {err}", file=sys.stderr)
            status = 2
            continue
        if args.json:
            print(json.dumps(info))
            continue
        if i:
            print()
        width = max(len(k) for k in info)
        for key, value in info.items():
            print(f"{key:<{width}}  {value}")
    return status


# -- thresholds ------------------------------------------------------------------
def cmd_thresholds(args):
    from rfisieve.detect import kurtosis as sk

    try:
        if args.pfa is not None:
            lower, upper = sk.sk_thresholds(args.m, n=args.n, d=args.d, pfa=args.pfa, method=args.method)
            what = f"PFA {args.pfa:g} per tail"
        else:
            lower, upper = sk.sk_thresholds_sigma(args.m, n=args.n, d=args.d, sigma=args.sigma,
                                                  method=args.method)
            what = f"{args.sigma:g} sigma"
    except ValueError as err:
        raise RfisieveError(f"thresholds: {err}") from None
    if args.quiet:
        print(f"{lower:.6f} {upper:.6f}")
    else:
        print(f"M = {args.m}, N = {args.n}, d = {args.d:g}, {what}, method {args.method}")
        print(f"lower {lower:.6f}")
        print(f"upper {upper:.6f}")
    return 0


# -- run ------------------------------------------------------------------------
def _resolve_profile(root, profile):
    if profile is None:
        profile = "local"
    candidate = os.path.join(root, "workflow", "profiles", profile)
    if os.sep not in profile and os.path.isdir(candidate):
        return candidate
    if os.path.isdir(profile):
        return os.path.abspath(profile)
    have = ", ".join(sorted(os.listdir(os.path.join(root, "workflow", "profiles"))))
    raise ConfigError(profile, f"no such profile directory; shipped profiles: {have}")


def snakemake_command(args, root):
    """``(command, outdir)``: the ``snakemake`` command line that ``rfisieve run`` starts from ``root``."""
    from rfisieve.config import load as config

    config_file = os.path.abspath(args.run_config) if args.run_config else os.path.join(
        root, "config", "config.yaml")
    overrides = config.parse_set(args.sets)
    for key in ("bands_dir", "previous_run"):  # paths given here are relative to the current directory
        if isinstance(overrides.get(key), str):
            overrides[key] = os.path.abspath(os.path.expanduser(overrides[key]))
    if args.inputs:
        overrides["inputs"] = [os.path.abspath(os.path.expanduser(p)) for p in args.inputs]
    if args.outdir:
        overrides["outdir"] = os.path.abspath(args.outdir)
    for key in ("strict", "keep_partial"):
        if getattr(args, key, False):
            overrides[key] = True
    run = config.load_run_config(config_file, overrides, overrides_source=_overrides_source(args))
    # Checked here so that a glob with no match is one line, before Snakemake starts;
    # Snakemake runs in ``root``, so relative inputs of a config file are relative to it.
    # Each scan is checked by the workflow itself: a bad scan is quarantined, not fatal.
    inputs = run["inputs"] if isinstance(run["inputs"], list) else [run["inputs"]]
    args.night_paths = config.expand_inputs([os.path.join(root, os.path.expanduser(p)) for p in inputs],
                                            source="--inputs" if args.inputs else config_file)
    args.night_run = run
    if run.get("strict"):  # today's stop-at-the-first-problem: one line, before Snakemake starts
        from rfisieve.engine import night

        night.check_night(args.night_paths, dict(run, bands_dir=os.path.join(root, run["bands_dir"])),
                          strict=True)
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", os.path.join(root, "Snakefile"),
           "--directory", root, "--configfile", config_file,
           "--workflow-profile", _resolve_profile(root, args.profile),
           "--rerun-incomplete", "--cores", str(args.cores)]
    if args.dry_run:
        cmd.append("--dry-run")
    elif not args.verbose:
        cmd += ["--quiet", "rules", "host", "progress"]  # errors; rfisieve run shows the progress
    if not args.dry_run:
        cmd += ["--until", "review"]  # the verdict is rfisieve run's own exit status
    # Extra arguments (options or target files) go before --config, which takes the rest.
    cmd += list(args.snakemake_args or [])
    if overrides:  # Snakemake reads these values as YAML; an empty value is null
        cmd += ["--config"] + [f"{k}={'' if v is None else json.dumps(v)}" for k, v in sorted(overrides.items())]
    return cmd, os.path.join(root, run["outdir"])


def _launch_command(cmd):
    """The command ``rfisieve run`` starts for ``cmd`` (``python -m snakemake ...``):
    the same arguments through :mod:`rfisieve.cli.snakemake_process`, which skips
    Python's shutdown after Snakemake has finished."""
    from rfisieve.cli.snakemake_process import MODULE

    if cmd[1:3] == ["-m", "snakemake"]:
        return [cmd[0], "-m", MODULE] + cmd[3:]
    return cmd


def _overrides_source(args):
    given = [name for name, value in (("--set", args.sets), ("--inputs", args.inputs), ("--outdir", args.outdir))
             if value]
    return " / ".join(given) or "--set"


def cmd_run(args):
    from rfisieve.cli import guard
    from rfisieve.config import load as config

    root = config.repo_root()
    if root is None:
        raise RfisieveError("rfisieve run needs the repository checkout (its Snakefile and workflow/); "
                            "install with `pip install -e <checkout>`")
    cmd, outdir = snakemake_command(args, str(root))
    if args.print_command:
        print(" ".join(_quote(c) for c in cmd))
        return 0
    from rfisieve.cli import run as night_run

    # One run per outdir, from any checkout; leftovers of killed runs cleared (cli/guard.py).
    with contextlib.nullcontext() if args.dry_run else guard.OutdirLock(outdir, root) as lock:
        if lock is not None:
            if lock.stale:
                guard.say(f"removed the stale lock of {outdir} (held by {guard._describe(lock.stale)}, "
                          "no longer running)")
            guard.clear_stale_snakemake_lock(root)
            guard.remove_leftovers(outdir)
        started = time.time()
        with guard.ChildGuard() as child:
            proc = night_run.start(_launch_command(cmd), root, args, launch=child.start)
            if lock is not None:
                # while Snakemake starts (its import and the night's checks take the first
                # second, before any job): its messages wait in the pipe, so the advice
                # still comes first on the terminal
                guard.memory_advice(args.night_paths, args.night_run,
                                    os.path.join(str(root), args.night_run["bands_dir"]), args.cores)
            rc = night_run.wait(proc, outdir, args)
        child.check()  # SIGINT/SIGTERM/SIGHUP: snakemake was stopped; one line, exit 128 + signal
        return night_run.finish(rc, outdir, args, root, started)


def _quote(s):
    import shlex

    return shlex.quote(s)


# -- parser ---------------------------------------------------------------------
OWN_COMMANDS = ("run", "inspect", "thresholds", "plan", "detect", "merge", "flag", "wrap-up", "verdict")


_INSPECT_HELP = "show what a scan file holds: shape, band, products, time span, frequencies"

_INSPECT_DESCRIPTION = (
    "Open scan files read-only and print shape and dtype, band, auto and cross "
    "products, time span (UTC, ISO 8601), frequency range (MHz), channel width, "
    "accumulations per dump, the upstream-flagged fraction and whether /s2 "
    "(per-dump sum of squared powers, used by per-dump spectral kurtosis) is there.")

_INSPECT_OPTIONS = [
    ("scans", {"nargs": "+", "metavar": "SCAN", "help": "scan file(s) (HDF5)"}),
    ("--json", {"action": "store_true", "help": "one JSON object per scan instead of a table"}),
]


#: One scan a step at a time (the workflow runs `flag`, which does all three in one pass):
#: (command, help, description, options).
_STEPS = (
    ("plan", "step 1 of one scan: check it and cut it into chunks of dumps -> plan JSON",
     "Open a scan read-only, check it against its band config, and write the processing plan: "
     "shape, products (autos/crosses), chunks of dumps with the halo each detector needs, and "
     "whether /s2 is there.",
     [(("--out", "-o"), {"metavar": "PLAN.json", "help": "plan file to write; default: print it"})]),
    ("detect", "step 2 of one scan: run one detector over it -> partial mask",
     "Run one detector over every chunk of a scan on dask workers and write a partial mask (HDF5 "
     "/flags, uint8: that detector's bit plus the invalid bit). sk = spectral kurtosis on auto "
     "products (bit 3, value 8); sumthreshold = SumThreshold on background-subtracted amplitudes "
     "(bit 4, value 16).",
     [("--detector", {"required": True, "choices": ("sk", "sumthreshold"), "help": "detector to run"}),
      (("--out", "-o"), {"required": True, "metavar": "PARTIAL.h5", "help": "partial mask file to write"}),
      ("--plan", {"metavar": "PLAN.json", "help": "plan from `rfisieve plan`; default: plan afresh"})]),
    ("merge", "step 3 of one scan: combine partial masks -> the scan's final mask file",
     "Combine the detectors' partial masks with the upstream flags (bit 0), invalid samples (bit 1) "
     "and the band's known-bad ranges (bit 2), grow them with the scale-invariant rank operator "
     "(bit 5) and cut channels/dumps above the occupancy limits (bit 6); write the mask file with "
     "/flags, /time, /freq, /products and the band config used.",
     [("--partial", {"nargs": "+", "required": True, "metavar": "PARTIAL.h5",
                     "help": "partial masks from `rfisieve detect`"}),
      (("--out", "-o"), {"required": True, "metavar": "MASK.h5", "help": "mask file to write"})]),
)


def build_parser(plugins=True):
    """The argparse tree; ``plugins=False`` leaves out the other modules' subcommands."""
    parser = argparse.ArgumentParser(prog="rfisieve", description=DESCRIPTION, formatter_class=_TopFormatter)
    parser.add_argument("--version", action="version", version=f"rfisieve {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")

    p = sub.add_parser(
        "run", formatter_class=_Formatter,
        help="flag a whole observing run through the Snakemake workflow (resumes where it stopped)",
        description="Run the workflow from the repository root: for every scan, plan its chunks, "
                    "run the spectral-kurtosis and SumThreshold detectors, merge them into "
                    "<outdir>/flags/<scan>.h5, count occupancy, and write the review page "
                    "<outdir>/report/index.html. An interrupted run continues where it stopped; "
                    "editing one band's config re-flags only that band's scans. Arguments after "
                    "`--` go to snakemake unchanged.")
    p.add_argument("--inputs", nargs="+", metavar="GLOB",
                   help="scan files or glob patterns (quote them), relative to the current directory; "
                        "default: inputs of the run config")
    p.add_argument("--outdir", metavar="DIR", help="output directory; default: outdir of the run config")
    p.add_argument("--cores", type=int, default=os.cpu_count() or 1, metavar="N",
                   help="CPU cores Snakemake may use in total (each flag job takes `workers` of them)")
    add_run_config_option(p, "config/config.yaml of the repository")
    p.add_argument("--set", dest="sets", action="append", default=[], metavar="KEY=VALUE",
                   help="override one run-config key (YAML value), e.g. --set workers=4 (repeatable)")
    p.add_argument("--profile", metavar="P",
                   help="Snakemake profile: a name under workflow/profiles (local, cluster) or a directory; "
                        "default: local")
    p.add_argument("--strict", action="store_true",
                   help="stop the night at the first bad scan (default: a bad scan is quarantined, listed "
                        "in <outdir>/failed_scans.csv, and the others are flagged; exit 1)")
    p.add_argument("--keep-partial", action="store_true",
                   help="also keep each detector's partial mask in <outdir>/partial/ (debugging)")
    p.add_argument("--dry-run", "-n", action="store_true", help="show the jobs that would run, run nothing")
    p.add_argument("--verbose", "-v", action="store_true",
                   help="show every job Snakemake starts, not only the progress lines")
    p.add_argument("--print-command", action="store_true", help="print the snakemake command and stop")
    p.add_argument("snakemake_args", nargs=argparse.REMAINDER, metavar="-- SNAKEMAKE_ARGS",
                   help="extra arguments passed to snakemake, after --")
    p.set_defaults(func=cmd_run)

    p = add_command(sub, "inspect", cmd_inspect,
        formatter=_Formatter, help=_INSPECT_HELP, description=_INSPECT_DESCRIPTION,
        options=_INSPECT_OPTIONS)
    _add_run_options(p)

    p = add_command(
        sub, "thresholds", cmd_thresholds,
        formatter=_Formatter,
        help="spectral-kurtosis thresholds for M accumulations (and N, d) at a PFA or sigma",
        description="Print the lower and upper spectral-kurtosis (SK) thresholds of the generalized "
                    "estimator (Nita & Gary 2010) for M accumulations of N-presummed powers with "
                    "shape d, each tail holding the false-alarm probability PFA, or the probability "
                    "a Gaussian holds beyond S sigma. Example: --m 300 --n 10 --sigma 3 gives about "
                    "0.77 and 1.28 (Nita & Gary 2010, PASP 122, 595, Table 1).",
        options=[
            ("--m", {"type": int, "required": True, "metavar": "M",
                     "help": "accumulations M per SK estimate"}),
            ("--n", {"type": int, "default": 1, "metavar": "N",
                     "help": "raw powers presummed into each accumulation"}),
            ("--d", {"type": float, "default": 1.0, "metavar": "D",
                     "help": "shape of the power distribution: 1 for complex voltages, 0.5 for real"}),
        ])
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--pfa", type=float, metavar="P", help="false-alarm probability per tail, e.g. 0.0013499")
    g.add_argument("--sigma", type=float, metavar="S", help="tail probability of a Gaussian beyond S sigma")
    p.add_argument("--method", default="auto", metavar="NAME",
                   help="threshold method: auto, exact, pearson (types IV/VI), pearson3 (type III)")
    p.add_argument("--quiet", "-q", action="store_true", help="print only 'lower upper'")

    for name, help, description, options in _STEPS:
        p = _add_stage(sub, name, globals()[f"cmd_{name}"], help=help, description=description)
        add_options(p, options)
        if name == "detect":
            _add_parallel_options(p)

    from rfisieve.cli import night

    night.register(sub, _Formatter, _add_run_options, _add_parallel_options)

    for name in PLUGIN_MODULES if plugins else ():
        try:
            module = importlib.import_module(name)
        except Exception as err:  # noqa: BLE001 - any failure means a broken installation
            raise PluginImportError(
                f"{name} cannot be imported ({type(err).__name__}: {' '.join(str(err).split())}); "
                "its commands are missing: the installation is broken, reinstall with "
                "`pip install -e <checkout>`") from err
        register = getattr(module, "register_cli", None)
        if register is None:
            raise PluginImportError(f"{name} has no register_cli(); its commands are missing")
        before = set(sub.choices)
        register(sub)
        for command in set(sub.choices) - before:
            _plain_defaults(sub.choices[command])
    return parser


def _plain_defaults(parser):
    """Show defaults the way the own commands do: never "(default: None)".

    A module that uses argparse's ArgumentDefaultsHelpFormatter gets ours instead,
    and a help text that names ``%(default)s`` of an option without a default loses it.
    """
    if parser.formatter_class is argparse.ArgumentDefaultsHelpFormatter:
        parser.formatter_class = _Formatter
    for action in parser._actions:
        if action.help and action.default is None and "(default: %(default)s)" in action.help:
            action.help = action.help.replace(" (default: %(default)s)", "").replace("(default: %(default)s)", "")


#: The workflow's job commands: run as a process (the ``rfisieve`` command), they end it
#: as soon as their work is done (:func:`_end_job_process`).
JOB_COMMANDS = ("flag", "wrap-up", "verdict")
#: Commands that end their process themselves: the jobs, and ``run``, which waits for
#: them (its own shutdown cost 0.11 s after Snakemake's end, measured on one small scan).
ENDS_ITSELF = JOB_COMMANDS + ("run",)


def main(argv=None):
    """Entry point of the ``rfisieve`` command; returns the exit status.

    Called as the command (``argv`` None) for one of the workflow's jobs
    (:data:`JOB_COMMANDS`) or for ``run`` (:data:`ENDS_ITSELF`), it ends the process
    itself (:func:`_end_job_process`).
    """
    rc = _main(argv)
    if argv is None and sys.argv[1:2] and sys.argv[1] in ENDS_ITSELF:
        _end_job_process(rc)
    return rc


def _end_job_process(rc):
    """End the process now, with status ``rc`` (:func:`rfisieve.cli.ending.end_process`):
    Python's own shutdown cost 0.17 s per flag job, 0.11 s per review job and 0.11 s for
    ``rfisieve run`` itself (measured on the bench scans and on one small scan), on the
    night's critical path.  Every output is closed and renamed into place by then
    (``run`` has released its lock and its guard of Snakemake when its command returns)."""
    from rfisieve.cli.ending import end_process

    end_process(rc)


def _main(argv=None):
    argv = list(sys.argv[1:] if argv is None else argv)
    # The other modules import numpy and friends: load them only when they may be needed.
    try:
        parser = build_parser(plugins=not (argv and argv[0] in OWN_COMMANDS))
    except PluginImportError as err:
        print(f"rfisieve: error: {err}", file=sys.stderr)
        return 2
    args = parser.parse_args(argv)
    if getattr(args, "func", None) is None:
        parser.print_help()
        return 2
    if getattr(args, "snakemake_args", None) and args.snakemake_args[0] == "--":
        args.snakemake_args = args.snakemake_args[1:]
    try:
        rc = args.func(args)
    except RfisieveError as err:
        print(f"rfisieve: error: {' '.join(str(err).split())}", file=sys.stderr)
        return getattr(err, "status", 2)
    except KeyboardInterrupt:
        print("rfisieve: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into head(1) and the like
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    return int(rc or 0)


if __name__ == "__main__":
    sys.exit(main())

"""``rfisieve tune``: sweep a band's main thresholds on a sample of real scans.

For each of the three main thresholds (SumThreshold's chi_1, the spectral-kurtosis
sigma, the SIR operator's eta), one at a time around the band's current value with
the others held at theirs, the sample scans are flagged twice:

1. a plain copy of the first ``max_dumps`` dumps: the *occupancy* (fraction of the
   samples flagged for any cause) that setting gives on the real data;
2. the same copy with synthetic interference of known INR injected
   (:mod:`rfisieve.evaluate.inject`): the *recall*, the fraction of the injected samples
   flagged, counted only on samples that the plain copy left unflagged at that setting
   (a sample already flagged for real interference says nothing about the injection).

Input files are never modified: the copies live in a temporary directory.

Suggestion rule
---------------
Real interference is flagged at any reasonable threshold, so the occupancy that a
more sensitive setting adds on top of the most conservative one of the sweep is
mostly clean data lost.  For each parameter the suggestion is the value of highest
recall whose occupancy exceeds the sweep's lowest occupancy by at most the budget
(``--occupancy-budget``, default 0.3 % of the samples); a value is changed only for
more recall (ties keep the current value, or take the most conservative allowed one
when the current value is over the budget).  Each parameter is chosen with the others
at their current
values (a one-at-a-time sweep); re-run ``tune`` on the suggestion to check it.
"""

import argparse
import copy
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from rfisieve.errors import ConfigError, RfisieveError
from rfisieve.io.scan import atomic_output
from rfisieve.commands import add_command

#: (section, key, label, step, sensitive direction) of the swept thresholds.
PARAMETERS = (
    ("sumthreshold", "chi1", "SumThreshold chi_1", 0.125, -1),   # relative step, lower = more sensitive
    ("kurtosis", "sigma", "kurtosis sigma", 0.5, -1),            # absolute step in sigma
    ("growth", "eta", "SIR eta", 0.1, +1),                       # absolute step, higher = more growth
)


def sweep_values(section, key, current, n=5):
    """``n`` values of one threshold around ``current`` (``current`` included, sorted).

    chi_1 in relative steps of 12.5 %, the kurtosis sigma in steps of 0.5, eta in steps
    of 0.1 (clipped to [0, 0.9]).
    """
    n = max(1, int(n))
    ks = np.arange(n) - (n - 1) // 2
    for sec, k, _, step, _ in PARAMETERS:
        if (sec, k) == (section, key):
            break
    else:
        raise KeyError(f"{section}.{key} is not a swept threshold")
    current = float(current)
    if key == "chi1":
        vals = [current * (1.0 + step * i) for i in ks]
    elif key == "sigma":
        vals = [current + step * i for i in ks]
    else:
        vals = [min(0.9, max(0.0, current + step * i)) for i in ks]
    vals = sorted({round(float(v), 4) for v in vals if v > 0 or key == "eta"})
    return vals


def _with(band, section, key, value):
    out = copy.deepcopy(band)
    out[section][key] = value
    return out


def _flag_and_read(scan_path, out_path, band, run):
    import h5py

    from rfisieve.engine import flag_scan

    flag_scan(scan_path, out_path, band, run)
    with h5py.File(out_path, "r") as f:
        mask = f["flags"][()]
    os.unlink(out_path)
    return mask


def evaluate(band, run, samples, workdir):
    """Occupancy and injection recall of one band setting over prepared samples.

    ``samples`` is a list of dict(plain=path, injected=path, inr=ndarray) from
    :func:`prepare_samples`.  Returns dict(occupancy, recall, recall_by_inr).
    """
    from rfisieve.evaluate.score import DECISION_BITS, PRIOR_BITS

    flagged = total = 0
    levels = {}
    for s in samples:
        plain = _flag_and_read(s["plain"], Path(workdir) / "mask_plain.h5", band, run)
        flagged += int(np.count_nonzero(plain))
        total += plain.size
        inj = _flag_and_read(s["injected"], Path(workdir) / "mask_inj.h5", band, run)
        usable = (s["inr"] > 0) & (plain == 0) & ((inj & PRIOR_BITS) == 0)
        hit = (inj & DECISION_BITS) != 0
        for level in np.unique(s["inr"][usable]):
            sel = usable & (s["inr"] == level)
            n, k = levels.get(float(level), (0, 0))
            levels[float(level)] = (n + int(sel.sum()), k + int((sel & hit).sum()))
    n_all = sum(n for n, _ in levels.values())
    k_all = sum(k for _, k in levels.values())
    return {
        "occupancy": flagged / total if total else None,
        "recall": k_all / n_all if n_all else None,
        "recall_by_inr": {f"{lv:g}": (k / n if n else None) for lv, (n, k) in sorted(levels.items())},
        "injected_samples": n_all,
    }


def prepare_samples(scans, workdir, layout=None, max_dumps=2048, seed=0, levels=(1.0, 2.0, 5.0),
                    fraction=0.01):
    """Copy each scan (first ``max_dumps`` dumps) twice into ``workdir``: plain and injected."""
    from rfisieve.evaluate.inject import copy_scan

    out = []
    for i, path in enumerate(scans):
        plain = Path(workdir) / f"sample{i:03d}_plain.h5"
        injected = Path(workdir) / f"sample{i:03d}_injected.h5"
        copy_scan(path, plain, layout, max_dumps)
        truth = copy_scan(path, injected, layout, max_dumps, injections=True, seed=seed + i,
                          levels=levels, fraction=fraction)
        out.append({"scan": str(path), "plain": plain, "injected": injected, "inr": truth["inr"],
                    "ntime": int(truth["inr"].shape[0])})
    return out


def suggest(rows, current, direction, budget):
    """Pick a value from one parameter's sweep rows (see the module docstring).

    ``rows`` are dicts with value, occupancy, recall; ``direction`` is -1 when lower
    values are more sensitive, +1 when higher ones are.
    """
    rows = [r for r in rows if r["occupancy"] is not None]
    if not rows:
        return current
    floor = min(r["occupancy"] for r in rows)
    ok = [r for r in rows if r["occupancy"] - floor <= budget + 1e-12]
    # conservative first: a more sensitive value must earn its place with more recall
    ok.sort(key=lambda r: direction * r["value"])
    here = [r for r in ok if abs(r["value"] - current) < 1e-9]
    best = here[0] if here else ok[0]
    for r in ok:
        if (r["recall"] or 0) > (best["recall"] or 0) + 1e-9:
            best = r
    return best["value"]


def run_tune(band_name, scans, bands_dir="config/bands", out_dir=None, values=5, max_dumps=2048,
             budget=0.003, levels=(1.0, 2.0, 5.0), fraction=0.01, seed=0, workers=1, progress=None,
             layout=None):
    """Sweep, report, plot and write ``<bands_dir>/<band>.suggested.yaml``.

    ``layout`` is the run config's layout of the input scans (dataset names, axis
    order); the copies are written in the standard layout.

    Returns dict(rows, suggestion, plot, table, suggested_path).
    """
    from rfisieve.config import load as config
    from rfisieve.io import scan as io
    from rfisieve.config import defaults as settings

    band, source = config.load_band(bands_dir, band_name)
    scans = [str(s) for s in scans]
    if not scans:
        raise ConfigError("--scans", "no scans given")
    for s in scans:
        got = io.scan_band(s, layout)
        if got != band_name:
            raise ConfigError(s, f"scan is of band {got!r}, not {band_name!r}")
    run = settings.run_settings({"workers": int(workers), "scheduler": "threads" if workers > 1 else "synchronous"})
    out_dir = Path(out_dir or f"tune-{band_name}")
    out_dir.mkdir(parents=True, exist_ok=True)
    say = progress or (lambda msg: None)

    jobs = [("current", None, None, None)]
    sweeps = {}
    for section, key, label, _, _ in PARAMETERS:
        cur = float(band[section][key])
        vals = sweep_values(section, key, cur, values)
        sweeps[(section, key)] = vals
        for v in vals:
            if abs(v - cur) > 1e-9:
                jobs.append((f"{section}.{key}", section, key, v))
    rows = []
    t_start = time.time()
    with tempfile.TemporaryDirectory(prefix="rfisieve-tune-") as tmp:
        say(f"copying {len(scans)} scan(s) (first {max_dumps} dumps; with and without injected interference)")
        samples = prepare_samples(scans, tmp, layout, max_dumps, seed, levels, fraction)
        results = {}
        for j, (name, section, key, value) in enumerate(jobs):
            setting = band if section is None else _with(band, section, key, value)
            res = evaluate(setting, run, samples, tmp)
            results[(section, key, value)] = res
            el = time.time() - t_start
            what = "current settings" if section is None else f"{section}.{key} = {value:g}"
            say(f"[{j + 1}/{len(jobs)}] {what}: occupancy {100 * res['occupancy']:.3f} %, "
                f"recall {res['recall']:.4f}  ({el:.0f} s, about {el / (j + 1) * (len(jobs) - j - 1):.0f} s left)")
    base = results[(None, None, None)]
    suggestion = {}
    for section, key, label, _, direction in PARAMETERS:
        cur = float(band[section][key])
        prow = []
        for v in sweeps[(section, key)]:
            res = base if abs(v - cur) < 1e-9 else results[(section, key, v)]
            prow.append({"parameter": f"{section}.{key}", "label": label, "value": float(v),
                         "current": bool(abs(v - cur) < 1e-9), **res})
        rows.extend(prow)
        suggestion[(section, key)] = suggest(prow, cur, direction, budget)
    meta = {"band": band_name, "band_config": source["path"], "scans": scans, "max_dumps": max_dumps,
            "levels": list(levels), "fraction": fraction, "budget": budget, "seed": seed}
    table = format_rows(rows, suggestion)
    plot = out_dir / f"tune_{band_name}.png"
    plot_rows(rows, suggestion, plot, band_name)
    with open(out_dir / f"tune_{band_name}.json", "w", encoding="utf-8") as fh:
        json.dump({"meta": meta, "rows": rows,
                   "suggestion": {f"{s}.{k}": v for (s, k), v in suggestion.items()}}, fh, indent=2)
    sugg_path = write_suggestion(out_dir, band_name, source, suggestion, meta, rows)
    return {"rows": rows, "suggestion": suggestion, "plot": str(plot), "table": table,
            "suggested_path": str(sugg_path)}


def format_rows(rows, suggestion):
    """Aligned table of the sweep rows; ``*`` marks the current value, ``<`` the suggested one."""
    levels = sorted({lv for r in rows for lv in r["recall_by_inr"]}, key=float)
    head = "".join(f" {'INR ' + lv:>8}" for lv in levels)
    lines = [f"  {'parameter':<20} {'value':>7}   {'occupancy':>10} {'recall':>8}{head}"]
    for r in rows:
        sec, key = r["parameter"].split(".")
        mark = ("*" if r["current"] else " ") + ("<" if abs(suggestion[(sec, key)] - r["value"]) < 1e-9 else " ")
        rec = "".join(f" {(r['recall_by_inr'].get(lv) or 0):>8.4f}" for lv in levels)
        lines.append(f"  {r['label']:<20} {r['value']:>7g} {mark} {100 * r['occupancy']:>8.3f} % "
                     f"{(r['recall'] or 0):>8.4f}{rec}")
    lines.append("  * current value   < suggested value")
    return "\n".join(lines)


def plot_rows(rows, suggestion, path, band_name):
    """Occupancy and recall against each threshold, one panel per parameter (PNG)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(PARAMETERS), figsize=(4.2 * len(PARAMETERS), 3.6))
    for ax, (section, key, label, _, _) in zip(np.atleast_1d(axes), PARAMETERS):
        pr = [r for r in rows if r["parameter"] == f"{section}.{key}"]
        x = [r["value"] for r in pr]
        ax.plot(x, [100 * r["occupancy"] for r in pr], "o-", color="#2b6f77", label="occupancy (%)")
        ax.set_xlabel(label)
        ax.set_ylabel("occupancy (% of samples)", color="#2b6f77")
        ax2 = ax.twinx()
        ax2.plot(x, [r["recall"] or 0 for r in pr], "s--", color="#b5651d", label="recall")
        ax2.set_ylabel("recall of injected interference", color="#b5651d")
        ax2.set_ylim(0, 1.02)
        for r in pr:
            if r["current"]:
                ax.axvline(r["value"], color="0.6", lw=1, ls=":")
        ax.axvline(suggestion[(section, key)], color="#6a3d9a", lw=1)
        ax.set_title(f"{label} (dotted: current, solid: suggested)", fontsize=8)
    fig.suptitle(f"band {band_name}: threshold sweep")
    fig.tight_layout()
    with atomic_output(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=110)
    plt.close(fig)


def write_suggestion(out_dir, band_name, source, suggestion, meta, rows):
    """Write ``<out_dir>/<band>.suggested.yaml`` (never ``<band>.yaml``); return its path.

    The band config's text is kept, comments and all, with the suggested values put in
    (:func:`rfisieve.config.load.set_yaml_values`).
    """
    from rfisieve.config import load as config

    path = Path(out_dir) / f"{band_name}.suggested.yaml"
    if path.resolve() == Path(source["path"]).resolve():  # pragma: no cover - guarded by the name
        raise RfisieveError(f"{path}: refusing to overwrite the band config")
    body = config.set_yaml_values(source["text"], {sk: float(v) for sk, v in suggestion.items()})
    config.validate(config.parse_yaml(body) or {}, "band.schema.yaml", path)
    header = [
        f"# Suggested band config for band {band_name}, written by `rfisieve tune` on "
        f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}.",
        f"# Derived from {source['path']} by sweeping, one at a time with the others at their",
        "# current values: " + ", ".join(f"{r[2]}" for r in PARAMETERS) + ".",
        f"# Sample: first {meta['max_dumps']} dumps of {len(meta['scans'])} scan(s):",
    ]
    header += [f"#   {s}" for s in meta["scans"]]
    header += [
        f"# Recall: synthetic interference injected into copies (INR {', '.join(f'{x:g}' for x in meta['levels'])};",
        f"# carriers, bursts, blobs covering {100 * meta['fraction']:g} % of the samples; seed {meta['seed']}),",
        "# counted on samples the un-injected copy left unflagged. Occupancy: any cause bit.",
        f"# Rule: per parameter, the value of highest recall whose occupancy is at most "
        f"{100 * meta['budget']:g} % of the samples",
        "# above the sweep's lowest occupancy (the extra is mostly clean data lost).",
        "# Choices:",
    ]
    for (section, key), value in suggestion.items():
        pr = [r for r in rows if r["parameter"] == f"{section}.{key}"]
        cur = [r for r in pr if r["current"]]
        pick = [r for r in pr if abs(r["value"] - value) < 1e-9]
        if cur and pick:
            header.append(f"#   {section}.{key}: {cur[0]['value']:g} -> {value:g} (occupancy "
                          f"{100 * cur[0]['occupancy']:.3f} % -> {100 * pick[0]['occupancy']:.3f} %, recall "
                          f"{cur[0]['recall'] or 0:.4f} -> {pick[0]['recall'] or 0:.4f})")
    header.append(f"# To use it: review, then copy over {Path(source['path']).name} yourself.")
    text = "\n".join(header) + "\n\n" + body
    with atomic_output(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)
    return path


# -- command line -----------------------------------------------------------------
def cmd_tune(args):
    """``rfisieve tune``: run the sweep and print the table."""
    from rfisieve.config import load as config

    scans = config.expand_inputs(args.scans, "--scans")
    if args.values < 1:
        raise ConfigError("--values", f"{args.values}: expected at least 1")

    def say(msg):
        print(f"rfisieve tune: {msg}", file=sys.stderr, flush=True)

    layout = None
    if args.run_config:
        layout = config.load_run_config(args.run_config)["layout"]
    res = run_tune(args.band, scans, bands_dir=args.bands_dir, out_dir=args.out, values=args.values,
                   max_dumps=args.max_dumps, budget=args.occupancy_budget, fraction=args.inject_fraction,
                   seed=args.seed, workers=args.workers, progress=say, layout=layout)
    print(f"band {args.band}: threshold sweep on {len(scans)} scan(s)")
    print(res["table"])
    print(f"plot: {res['plot']}")
    print(f"suggested band config: {res['suggested_path']} (the band config itself is unchanged)")
    return 0


_TUNE_HELP = "sweep a band's thresholds on sample scans; suggest a band config"

_TUNE_DESCRIPTION = (
    "Sweep the main detection thresholds of a band on a sample of its scans, one at a time\n"
    "around the current value (SumThreshold chi_1, the spectral-kurtosis sigma, the SIR\n"
    "operator's eta). For each value: the occupancy on the real data, and the recall of\n"
    "synthetic interference of known strength (INR 1, 2, 5) injected into a copy of it.\n"
    "The input scans and the band config are never modified: the copies live in a\n"
    "temporary directory. Writes a table (stdout), <out>/tune_<band>.png,\n"
    "<out>/tune_<band>.json and the suggestion <out>/<band>.suggested.yaml (the band\n"
    "config with the suggested values put in, its comments kept).\n\n"
    "Suggestion: per parameter, the value of highest recall whose occupancy is at most\n"
    "the occupancy budget above the sweep's lowest occupancy.")

_TUNE_OPTIONS = [
    ("--band", {"required": True, "metavar": "BAND",
                "help": "band to tune (its config: <bands-dir>/<BAND>.yaml)"}),
    ("--scans", {"required": True, "nargs": "+", "metavar": "SCAN",
                 "help": "sample scan files (paths or globs) of that band"}),
    ("--bands-dir", {"default": "config/bands", "metavar": "DIR",
                     "help": "directory of the band configs (default: %(default)s)"}),
    ("--out", {"metavar": "DIR",
               "help": "directory for the plot, the table and the suggested band config (default: tune-<band>)"}),
    ("--values", {"type": int, "default": 5, "metavar": "N",
                  "help": "values per parameter, centred on the current one (default: %(default)s)"}),
    ("--max-dumps", {"type": int, "default": 2048, "metavar": "N",
                     "help": "dumps used from the start of each scan (default: %(default)s)"}),
    ("--occupancy-budget", {"type": float, "default": 0.003, "metavar": "F",
                            "help": "extra occupancy (fraction of samples) allowed over the sweep's lowest "
                "(default: %(default)s = 0.3 %%)"}),
    ("--inject-fraction", {"type": float, "default": 0.01, "metavar": "F",
                           "help": "fraction of the samples given injected interference (default: %(default)s)"}),
    ("--seed", {"type": int, "default": 0,
                "help": "seed of the injected interference (default: %(default)s)"}),
    ("--run-config", {"metavar": "FILE",
                      "help": "run config whose `layout` describes the scans' dataset names and axis order "
                "(default: the standard layout)"}),
    ("--workers", {"type": int, "default": 1, "metavar": "N",
                   "help": "dask workers per flagging run (default: %(default)s)"}),
]


#: The command's texts and options (:func:`rfisieve.commands.add_command`).
_TUNE = {"formatter": argparse.RawDescriptionHelpFormatter, "help": _TUNE_HELP,
         "description": _TUNE_DESCRIPTION,
         "epilog": "example: rfisieve tune --band L --scans 'night1/*_L_*.h5' --out tune-L",
         "options": _TUNE_OPTIONS}


def register_cli(subparsers):
    """Add the ``tune`` subcommand to the ``rfisieve`` command."""
    return add_command(subparsers, "tune", cmd_tune, **_TUNE)


__all__ = ["run_tune", "sweep_values", "suggest", "evaluate", "prepare_samples", "write_suggestion",
           "format_rows", "plot_rows", "register_cli", "PARAMETERS"]

"""The morning review: run tables, the review page and the terminal summary.

``rfisieve review OUTDIR --scans OCC.h5 ...`` aggregates the per-scan occupancy files
(:mod:`rfisieve.review.occupancy`) into ``<outdir>/occupancy/run.csv`` and ``run.h5``, draws
the figures into ``<outdir>/report/`` and writes ``<outdir>/report/index.html``, one
self-contained page (images embedded as base64 ``data:`` URIs) that opens from disk.
It also reads, read-only, each scan's mask file (settings and version as used), the data
image the flag job stored in the occupancy file (a downsampled dynamic spectrum; the scan
file itself only for an occupancy file without one) and ``<outdir>/failed_scans.csv``
(:mod:`rfisieve.review.provenance`); each of these may be missing, and the page says so.

Page, top to bottom: overview cards (the kurtosis card says "check" whenever its inputs
are cut off), failed or skipped scans, flagged samples by cause, the night, the most
occupied ranges, occupancy by frequency (emitters, protected ranges), change since the
previous run (settings diff beside the occupancy change), scans (data above mask),
products, kurtosis check, the settings as used, the mask bits.  All times are UTC.

Figures written (file names are fixed so the workflow can declare them):

* ``report/night.png``: flagged fraction over the night, one panel per band, scans shaded;
* ``report/band_<band>.png``: occupancy vs frequency, stacked by first cause, emitters marked;
* ``report/scan_<scan>.png``: the data (relative to the bandpass) above the mask, same axes;
* ``report/kurtosis_<band>_<i>.png``: SK histogram of the band's scans with one SK setting,
  pooled, around the thresholds over its expected density and over its whole range;
  ``report/kurtosis_<scan>.png`` for each scan whose own check fails (at most 8);
* ``report/change_<band>.png``: change per channel since ``--previous`` (only with it).

``rfisieve summary OUTDIR`` prints the run overview and the most occupied ranges from
``<outdir>/occupancy/run.h5``.
"""

import argparse
import csv
import json
import os

import numpy as np

from rfisieve.review import occupancy as occ
from rfisieve.textfmt import count_noun as _count
from rfisieve.textfmt import pct as _pct
from rfisieve.textfmt import utc_minutes as _utc
from rfisieve.review.emitters import load_emitters, match_emitters, merge_duplicates
from rfisieve.errors import ConfigError, ScanError
from rfisieve.io.scan import atomic_output
from rfisieve.review.occupancy import BIT_NAMES, fraction
from rfisieve.review.html import MAX_SCAN_SK_FIGURES, SAME, TOP_RANGES, render_page, run_totals  # noqa: F401

RANGE_FRACTION = 0.2   # a channel belongs to an occupied range at this flagged fraction
#: Name of the any-cause fraction column of run.csv, newest first (older runs: ``flagged``).
FLAGGED_COLUMNS = ("flagged_fraction", "flagged")


# ---------------------------------------------------------------------------
# building blocks (no HTML)
# ---------------------------------------------------------------------------

def annotated_ranges(bands, emitters, threshold=RANGE_FRACTION):
    """Occupied ranges of every band (:func:`rfisieve.review.occupancy.occupied_ranges`) with matching emitters.

    Returns a list of dicts (``band`` and ``emitters`` added, duplicates merged by
    :func:`rfisieve.review.emitters.merge_duplicates`), largest flagged sample count first.
    """
    out = []
    for band, agg in bands.items():
        for r in occ.occupied_ranges(agg["freq"], agg["flagged"], agg["samples"], threshold, agg["primary"]):
            r["band"] = band
            ems = merge_duplicates(match_emitters(r["start_mhz"], r["stop_mhz"], emitters))
            r["emitters"] = sorted(ems, key=lambda e: -(min(e["stop_mhz"], r["stop_mhz"])
                                                       - max(e["start_mhz"], r["start_mhz"])))
            out.append(r)
    out.sort(key=lambda r: -r["flagged"])
    return out




def read_previous(path):
    """Read a previous run.csv: {band: (freq_key array, flagged fraction array)}."""
    path = str(path)
    if not os.path.isfile(path):
        raise ConfigError(path, "previous run.csv not found")
    out = {}
    try:
        with open(path, newline="") as fh:
            rows = list(csv.DictReader(fh))
    except (OSError, csv.Error) as err:
        raise ConfigError(path, f"cannot read as CSV ({err})") from None
    col = next((c for c in FLAGGED_COLUMNS if rows and c in rows[0]), None)
    if rows and (col is None or not {"band", "freq_mhz"} <= set(rows[0])):
        raise ConfigError(path, "not a run.csv (needs columns band, freq_mhz and flagged_fraction or flagged)")
    for r in rows:
        try:
            f = float(r["freq_mhz"]) * 1e6
            v = float(r[col]) if r[col] != "" else np.nan
        except ValueError:
            raise ConfigError(path, f"bad number in row {r}") from None
        out.setdefault(r["band"], ([], []))
        out[r["band"]][0].append(f)
        out[r["band"]][1].append(v)
    return {b: (occ.freq_key(v[0]), np.array(v[1], float)) for b, v in out.items()}


def previous_total(path):
    """Flagged fraction of a previous run as a whole (run.csv rows weighted by ``samples``), or None."""
    try:
        with open(str(path), newline="") as fh:
            rows = list(csv.DictReader(fh))
        col = next((c for c in FLAGGED_COLUMNS if rows and c in rows[0]), None)
        pairs = [(float(r["samples"]), float(r[col])) for r in rows if col and r.get(col) not in ("", None)]
    except (OSError, csv.Error, KeyError, ValueError):
        return None
    n = sum(p[0] for p in pairs)
    return sum(a * b for a, b in pairs) / n if n else None


def previous_on_grid(prev, band, freq_hz):
    """The previous run's flagged fraction on this run's channel grid (NaN where absent)."""
    out = np.full(len(freq_hz), np.nan)
    if band not in prev:
        return out
    keys, vals = prev[band]
    order = np.argsort(keys)
    keys, vals = keys[order], vals[order]
    k = occ.freq_key(freq_hz)
    idx = np.clip(np.searchsorted(keys, k), 0, max(len(keys) - 1, 0))
    if len(keys):
        hit = keys[idx] == k
        out[hit] = vals[idx[hit]]
    return out


def night_series(scans, points=600):
    """Flagged fraction over time per band for the night plot: {band: [dict per scan]}."""
    out = {}
    for s in scans:
        a = s["attrs"]
        t = np.asarray(s["time"], float)
        if not len(t):
            continue
        fl = np.asarray(s["dump/flagged"], float)
        sm = np.asarray(s["dump/samples"], float)
        starts = occ.bin_starts(len(t), points)[:-1]
        tb = np.add.reduceat(t, starts) / np.diff(np.append(starts, len(t)))
        frac = fraction(np.add.reduceat(fl, starts), np.add.reduceat(sm, starts))
        dt = float(a.get("integration_time") or 0.0)
        out.setdefault(str(a["band"]), []).append(
            {"name": str(a["scan"]), "time": tb, "frac": frac, "start": t[0] - dt / 2, "stop": t[-1] + dt / 2})
    return out


# ---------------------------------------------------------------------------
# the review: tables, figures, page
# ---------------------------------------------------------------------------

def build_review(outdir, scan_files, previous=None, emitters_path=None, bands_dir=None,
                 threshold=RANGE_FRACTION, data_preview=True, workers=1):
    """Write run.csv, run.h5, the figures and index.html for the run in ``outdir``.

    Besides the per-scan occupancy files it reads, read-only, each scan's mask file
    (settings and version, :func:`rfisieve.review.provenance.mask_provenance`), the
    downsampled dynamic spectrum (``data_preview``: the occupancy file's ``/image/data``,
    or the scan file itself for an occupancy file without it), and
    ``<outdir>/failed_scans.csv``.  The figures are drawn in ``workers``
    processes.  Returns the path of ``index.html``.
    """
    pool = _start_pool(workers)  # its processes import matplotlib while this one reads
    try:
        return _build_review(outdir, scan_files, previous, emitters_path, bands_dir, threshold, data_preview, pool)
    except BaseException:
        if pool is not None:  # the figures not yet begun are not drawn
            pool.shutdown(cancel_futures=True)
        raise
    finally:
        if pool is not None:
            pool.shutdown()


def _build_review(outdir, scan_files, previous, emitters_path, bands_dir, threshold, data_preview, pool):
    from rfisieve import __version__
    from rfisieve.review import provenance as pv

    # the images are read where the scan's figure is drawn, by the pool's processes
    scans = [occ.read_scan_h5(p, images=False) for p in scan_files]
    names = [str(s["attrs"]["scan"]) for s in scans]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise ScanError(scan_files[names.index(dup[0])], f"scan {dup[0]} given twice")
    files = dict(zip(names, map(str, scan_files)))  # by scan name (unique now)
    scans.sort(key=lambda s: (float(s["attrs"]["start_time"]), str(s["attrs"]["scan"])))
    provs = {str(s["attrs"]["scan"]): pv.mask_provenance(s["attrs"].get("mask")) for s in scans}
    occ_dir = os.path.join(outdir, "occupancy")
    rep_dir = os.path.join(outdir, "report")
    os.makedirs(occ_dir, exist_ok=True)
    os.makedirs(rep_dir, exist_ok=True)

    # Every figure is one job (the kurtosis figures one together, with the SK summaries
    # the page needs), drawn in up to ``workers`` forked processes.  The jobs that need
    # only the scans (the kurtosis figures, the longest, then one per scan) go first, so
    # the pool draws while this process aggregates the run and writes its tables; the
    # band, change and night figures follow.  (A night of 24 small scans: the pool's
    # processes used to wait 0.27 s for this process to read the scans and write the
    # tables; the images, 3 MiB per small scan, are no longer read or sent here.)
    figs = {"band": {}, "scan": {}, "kurtosis": [], "change": {}, "night": None, "shown": {}, "data_note": {}}
    jobs = [("kurtosis", ([{"attrs": s["attrs"], "sk": s.get("sk")} for s in scans], rep_dir))]
    for s in scans:
        name = str(s["attrs"]["scan"])
        ident = (provs[name].get("input") or {}) if data_preview else None
        figs["scan"][name] = os.path.join(rep_dir, f"scan_{name}.png")
        jobs.append(("scan", (figs["scan"][name], s, ident, files[name])))
    drawing = [_submit(_figure, job, pool) for job in jobs]

    bands = occ.aggregate_run(scans)
    overview = occ.scan_overview(scans)
    emitters = load_emitters(emitters_path, bands_dir=bands_dir, bands=list(bands))
    prev = read_previous(previous) if previous else None
    settings = pv.band_settings_of([(str(s["attrs"]["band"]), provs[str(s["attrs"]["scan"])]) for s in scans])
    failed, failed_note = pv.read_failed(outdir)
    prev_settings, prev_where = pv.previous_settings(previous) if previous else (None, None)

    occ.write_csv(os.path.join(occ_dir, "run.csv"), occ.run_table(bands))
    occ.write_run_h5(os.path.join(occ_dir, "run.h5"), bands, overview,
                     attrs={"emitters_json": json.dumps(emitters), "range_fraction": float(threshold),
                            "band_settings_json": json.dumps(settings, sort_keys=True),
                            "rfisieve_version": __version__})

    later = []
    for band, agg in bands.items():
        figs["band"][band] = os.path.join(rep_dir, f"band_{band}.png")
        later.append(("band", (figs["band"][band], band, agg, emitters)))
        if prev is not None:
            p = os.path.join(rep_dir, f"change_{band}.png")
            before = previous_on_grid(prev, band, agg["freq"])
            later.append(("change", (p, band, agg["freq"], fraction(agg["flagged"], agg["samples"]), before)))
            figs["change"][band] = (p, before)
    if scans:
        figs["night"] = os.path.join(rep_dir, "night.png")
        later.append(("night", (figs["night"], night_series(scans))))
    jobs += later
    drawing += [_submit(_figure, job, pool) for job in later]
    for (kind, args), job in zip(jobs, drawing):
        result = job.result()
        if kind == "kurtosis":
            sk_summaries, figs["kurtosis"] = result
        elif kind == "scan":
            figs["data_note"][str(args[1]["attrs"]["scan"])] = result
        elif kind == "band":
            figs["shown"][args[1]] = result

    ranges = annotated_ranges(bands, emitters, threshold)
    ctx = {"provs": provs, "settings": settings, "failed": failed, "failed_note": failed_note,
           "prev_settings": prev_settings, "prev_where": prev_where, "version": __version__,
           "prev_total": previous_total(previous) if previous else None}
    page = render_page(outdir, scans, bands, overview, ranges, figs, sk_summaries, prev,
                       threshold, previous, ctx)
    index = os.path.join(rep_dir, "index.html")
    with atomic_output(index) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        fh.write(page)
    return index


def _figure(job):
    """Draw one figure job of :func:`build_review`: ``(kind, args)``; returns what the page
    needs of it (the data note of a scan figure, the emitters shown on a band figure,
    the SK summaries and figure list of the kurtosis figures)."""
    from rfisieve.review import plots as rp

    kind, args = job
    if kind == "scan":
        return _scan_figure(args)
    if kind == "kurtosis":
        return kurtosis_figures(*args)
    return {"band": rp.band_occupancy, "change": rp.change_plot, "night": rp.night_fraction}[kind](*args)


def _scan_figure(job):
    """Draw one scan's data-and-mask figure; returns the note on its data preview."""
    from rfisieve.review import plots as rp
    from rfisieve.review import provenance as pv

    path, s, ident, occupancy_file = job
    s = {**s, **occ.read_scan_images(occupancy_file)}
    data, note = None, "not read (data_preview=False)"
    if ident is not None and "image/data" in s:  # taken by the flag job while it read the scan
        data, note = s["image/data"], str(s["attrs"].get("data_image_note", ""))
    elif ident is not None:  # an occupancy file without it: read the scan file
        data, note = pv.data_preview(ident.get("path"), s["image/time_start"], s["image/chan_start"],
                                     expect_size=ident.get("size"))
    rp.scan_image(path, s, data=data, data_note=note if data is not None else "")
    return note


def _load_plots():
    from rfisieve.review import plots  # noqa: F401


def _start_pool(workers):
    """``workers`` forked processes for the figures, started now, each importing
    matplotlib as it starts (None for one worker: the figures are then drawn here)."""
    if int(workers or 1) <= 1:
        return None
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    pool = ProcessPoolExecutor(int(workers), mp_context=multiprocessing.get_context("fork"),
                               initializer=_load_plots)
    pool.submit(int)  # a fork-based pool starts all its processes at the first task
    return pool


class _Done:
    """A result computed here, with the ``result()`` of a future."""

    def __init__(self, value):
        self.value = value

    def result(self):
        return self.value


def _submit(fn, item, pool):
    """``fn(item)`` in ``pool``: its future (computed here, now, when ``pool`` is None)."""
    if pool is None:
        return _Done(fn(item))
    return pool.submit(fn, item)


def kurtosis_figures(scans, rep_dir):
    """SK summaries of every scan, and the kurtosis figures: one per band and SK setting
    with the histograms of its scans pooled (same bins, same thresholds), plus one for
    each scan whose own check fails (at most :data:`MAX_SCAN_SK_FIGURES`).

    Returns ({scan: summary}, [(heading, png path)]).
    """
    from rfisieve.review import plots as rp

    empty = {"edges": np.linspace(0, 3, 2), "counts": np.zeros((1, 1), np.int64), "attrs": {}}
    summaries, groups = {}, {}
    for s in scans:
        name, sk = str(s["attrs"]["scan"]), s.get("sk") or empty
        summaries[name] = rp.sk_summary(sk)[0]
        at = sk.get("attrs", {})
        edges = np.asarray(sk["edges"], float)
        key = (str(s["attrs"]["band"]), tuple(str(at.get(k)) for k in ("mode", "m", "n", "d", "lower", "upper")),
               edges.tobytes())
        groups.setdefault(key, []).append((name, sk))
    out = []
    for i, ((band, _, _), members) in enumerate(groups.items()):
        sk0 = members[0][1]
        counts = sum(np.asarray(sk["counts"]).reshape(-1, len(sk0["edges"]) - 1).sum(axis=0) for _, sk in members)
        pooled = {"edges": sk0["edges"], "counts": counts[np.newaxis, :], "attrs": sk0.get("attrs", {})}
        at = pooled["attrs"]
        what = f"M={at.get('m')} N={at.get('n')} d={at.get('d')}" if at.get("m") is not None else "SK off"
        heading = f"Band {band}, {what}: {_count(len(members), 'scan')} pooled"
        p = os.path.join(rep_dir, f"kurtosis_{band}_{i}.png")
        rp.sk_diagnostic(p, pooled, title=f"Spectral kurtosis, band {band} ({what}), "
                                          f"{_count(len(members), 'scan')} pooled: measured vs expected")
        out.append((heading, p))
    checks = [(name, sk) for members in groups.values() for name, sk in members
              if summaries[name].get("verdict") == "check"]
    for name, sk in checks[:MAX_SCAN_SK_FIGURES]:
        p = os.path.join(rep_dir, f"kurtosis_{name}.png")
        rp.sk_diagnostic(p, sk, title=f"Spectral kurtosis of scan {name}: measured vs expected")
        out.append((f"Scan {name} (its check fails)", p))
    return summaries, out


# ---------------------------------------------------------------------------
# terminal summary
# ---------------------------------------------------------------------------

def text_table(head, rows, right=None):
    """Aligned plain-text table (columns right-aligned unless listed as left in ``right`` False)."""
    cols = list(zip(*([head] + rows))) if rows else [[h] for h in head]
    widths = [max(len(str(c)) for c in col) for col in cols]
    right = right or [True] * len(head)

    def line(r):
        return "  ".join(str(c).rjust(w) if rt else str(c).ljust(w) for c, w, rt in zip(r, widths, right)).rstrip()

    out = [line(head), "  ".join("-" * w for w in widths)]
    out += [line(r) for r in rows]
    return "\n".join(out)


def summary_text(outdir, top=TOP_RANGES, threshold=None):
    """The text printed by ``rfisieve summary``."""
    bands, overview, attrs = occ.read_run_h5(os.path.join(outdir, "occupancy", "run.h5"))
    emitters = json.loads(attrs.get("emitters_json", "[]"))
    if threshold is None:
        threshold = float(attrs.get("range_fraction", RANGE_FRACTION))
    tot = run_totals(overview)
    frac = tot["flagged"] / tot["samples"] if tot["samples"] else float("nan")
    out = [f"rfisieve run {os.path.abspath(outdir)}",
           f"  observed {_utc(tot['start'])} to {_utc(tot['stop'])}: {tot['scans']} scan{'s' if tot['scans'] != 1 else ''}, "
           f"bands {', '.join(tot['bands']) or 'none'}, {tot['hours']:.2f} h",
           f"  flagged {_pct(frac)} of {tot['samples']:,} samples", ""]
    rows = [[name, f"{int(tot['bits'][k]):,}", _pct(tot["bits"][k] / tot["samples"] if tot["samples"] else np.nan)]
            for k, name in enumerate(BIT_NAMES)]
    rows.append(["any cause", f"{tot['flagged']:,}", _pct(frac)])
    out += [text_table(["cause", "samples", "fraction"], rows, [False, True, True]), ""]
    rows = []
    for r in overview:
        f = r["flagged"] / r["samples"] if r["samples"] else np.nan
        rows.append([r["name"], r["band"], _utc(r["start_time"]), f"{r['hours']:.2f}", _pct(f)])
    out += [text_table(["scan", "band", "start", "hours", "flagged"], rows, [False, False, False, True, True]), ""]
    ranges = annotated_ranges(bands, emitters, threshold)
    out.append(f"Most occupied ranges (channels >= {100 * threshold:.0f} % flagged), largest loss first:")
    rows = []
    for r in ranges[:top]:
        ems = "; ".join(e["name"] for e in r["emitters"][:3]) or "-"
        rows.append([r["band"], f"{r['start_mhz']:.3f}", f"{r['stop_mhz']:.3f}", str(r["channels"]),
                     _pct(r["mean_fraction"], 1), r["cause"], ems])
    if rows:
        out.append(text_table(["band", "from MHz", "to MHz", "chans", "mean", "cause", "known emitters"], rows,
                              [False, True, True, True, True, False, False]))
        if len(ranges) > top:
            out.append(f"... {len(ranges) - top} more (--top)")
    else:
        out.append("  none")
    return "\n".join(out)


# ---------------------------------------------------------------------------
# command line
# ---------------------------------------------------------------------------

def _cmd_review(args):
    # RfisieveError reaches rfisieve.cli.main, which prints it as one line, exit 2
    index = build_review(args.outdir, args.scans, previous=args.previous,
                         emitters_path=args.emitters, bands_dir=args.bands_dir,
                         threshold=args.range_fraction)
    print(index)
    return 0


def _cmd_summary(args):
    print(summary_text(args.outdir, top=args.top, threshold=args.range_fraction))
    return 0


def _fraction_arg(text):
    v = float(text)
    if not 0.0 < v <= 1.0:
        raise argparse.ArgumentTypeError(f"must lie in (0, 1], got {text}")
    return v


def register_cli(subparsers):
    """Add the ``review`` and ``summary`` subcommands to an argparse ``subparsers`` object."""
    fmt = argparse.ArgumentDefaultsHelpFormatter
    p = subparsers.add_parser(
        "review", help="aggregate a run's occupancy and write the morning review page",
        description=(
            "Aggregate the per-scan occupancy files (written by `rfisieve occupancy`) over the "
            "run, weighted by samples and per band, and write OUTDIR/occupancy/run.csv, "
            "OUTDIR/occupancy/run.h5, the figures OUTDIR/report/*.png and the self-contained "
            "page OUTDIR/report/index.html. Prints the page's path."),
        formatter_class=fmt)
    p.add_argument("outdir", metavar="OUTDIR", help="the run's output directory")
    p.add_argument("--scans", nargs="*", default=[], metavar="OCC.h5",
                   help="per-scan occupancy files (OUTDIR/occupancy/<scan>.h5); none when every scan "
                        "failed (the page then names the failed scans only)")
    p.add_argument("--previous", metavar="RUN.csv", default=None,
                   help="a previous run's run.csv: show the change of occupancy per channel since then")
    p.add_argument("--emitters", metavar="YAML", default=None,
                   help="known-emitter list (default: config/emitters.yaml of the package's repository)")
    p.add_argument("--bands-dir", metavar="DIR", default=None,
                   help="band configs whose 'emitters' entries are merged into the list")
    p.add_argument("--range-fraction", type=_fraction_arg, default=RANGE_FRACTION, metavar="F",
                   help="flagged fraction at which a channel belongs to an occupied range")
    p.set_defaults(func=_cmd_review)

    s = subparsers.add_parser(
        "summary", help="print a run's overview and its most occupied channel ranges",
        description=("Print the overview of a reviewed run (scans, bands, hours, flagged fraction by "
                     "cause, per scan) and its most occupied channel ranges with the known emitters "
                     "they overlap, read from OUTDIR/occupancy/run.h5 (run `rfisieve review` first)."),
        formatter_class=fmt)
    s.add_argument("outdir", metavar="OUTDIR", help="the run's output directory")
    s.add_argument("--top", type=int, default=TOP_RANGES, metavar="N", help="ranges to list")
    s.add_argument("--range-fraction", type=_fraction_arg, default=None, metavar="F",
                   help="flagged fraction at which a channel belongs to a range (default: the review's)")
    s.set_defaults(func=_cmd_summary)
    return p, s

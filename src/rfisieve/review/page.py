"""The morning review: run tables, the review page and the terminal summary.

``rfisieve review OUTDIR --scans OCC.h5 ...`` aggregates the per-scan occupancy files
(:mod:`rfisieve.review.occupancy`) into ``<outdir>/occupancy/run.csv`` and ``run.h5``, draws
the figures into ``<outdir>/report/`` and writes ``<outdir>/report/index.html``, one
self-contained page (images embedded as base64 ``data:`` URIs) that opens from disk.

Figures written (file names are fixed so the workflow can declare them):

* ``report/band_<band>.png``: occupancy vs frequency, stacked by first cause, emitters marked;
* ``report/scan_<scan>.png``: time x frequency occupancy image with margins;
* ``report/kurtosis_<scan>.png``: SK histogram over its expected density and thresholds
  (a placeholder saying so when the mask has no SK diagnostics);
* ``report/change_<band>.png``: change per channel since ``--previous`` (only with it).

``rfisieve summary OUTDIR`` prints the run overview and the most occupied ranges from
``<outdir>/occupancy/run.h5``.
"""

import argparse
import base64
import csv
import datetime as _dt
import html
import json
import os

import numpy as np

from rfisieve.review import occupancy as occ
from rfisieve.review.emitters import load_emitters, match_emitters
from rfisieve.errors import ConfigError, ScanError
from rfisieve.io.scan import atomic_output
from rfisieve.review.occupancy import BIT_NAMES, fraction

RANGE_FRACTION = 0.2   # a channel belongs to an occupied range at this flagged fraction
TOP_RANGES = 15


# ---------------------------------------------------------------------------
# building blocks (no HTML)
# ---------------------------------------------------------------------------

def annotated_ranges(bands, emitters, threshold=RANGE_FRACTION):
    """Occupied ranges of every band (:func:`rfisieve.review.occupancy.occupied_ranges`) with matching emitters.

    Returns a list of dicts (``band`` and ``emitters`` added), largest flagged sample count first.
    """
    out = []
    for band, agg in bands.items():
        for r in occ.occupied_ranges(agg["freq"], agg["flagged"], agg["samples"], threshold, agg["primary"]):
            r["band"] = band
            seen, ems = set(), []
            for e in match_emitters(r["start_mhz"], r["stop_mhz"], emitters):
                if e["name"].lower() not in seen:   # a site entry repeating a shipped one
                    seen.add(e["name"].lower())
                    ems.append(e)
            r["emitters"] = ems
            out.append(r)
    out.sort(key=lambda r: -r["flagged"])
    return out


def run_totals(overview):
    """Totals of the run: scans, bands, hours, samples, flagged, bits (nbits,)."""
    bits = np.zeros(len(BIT_NAMES), np.int64)
    for r in overview:
        bits += np.asarray(r["bits"], np.int64)
    return {
        "scans": len(overview),
        "bands": sorted({r["band"] for r in overview}),
        "hours": float(sum(r["hours"] for r in overview)),
        "samples": int(sum(r["samples"] for r in overview)),
        "flagged": int(sum(r["flagged"] for r in overview)),
        "bits": bits,
        "start": min((r["start_time"] for r in overview), default=float("nan")),
        "stop": max((r["stop_time"] for r in overview), default=float("nan")),
    }


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
    if rows and not {"band", "freq_mhz", "flagged"} <= set(rows[0]):
        raise ConfigError(path, "not a run.csv (needs columns band, freq_mhz, flagged)")
    for r in rows:
        try:
            f = float(r["freq_mhz"]) * 1e6
            v = float(r["flagged"]) if r["flagged"] != "" else np.nan
        except ValueError:
            raise ConfigError(path, f"bad number in row {r}") from None
        out.setdefault(r["band"], ([], []))
        out[r["band"]][0].append(f)
        out[r["band"]][1].append(v)
    return {b: (occ.freq_key(v[0]), np.array(v[1], float)) for b, v in out.items()}


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


def _utc(t):
    if t is None or not np.isfinite(t):
        return "?"
    return _dt.datetime.fromtimestamp(float(t), tz=_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _pct(x, digits=2):
    if x is None or not np.isfinite(x):
        return "n/a"
    return f"{100 * x:.{digits}f} %"


# ---------------------------------------------------------------------------
# the review: tables, figures, page
# ---------------------------------------------------------------------------

def build_review(outdir, scan_files, previous=None, emitters_path=None, bands_dir=None,
                 threshold=RANGE_FRACTION):
    """Write run.csv, run.h5, the figures and index.html for the run in ``outdir``.

    Returns the path of ``index.html``.
    """
    from rfisieve.review import plots as rp

    scans = [occ.read_scan_h5(p) for p in scan_files]
    names = [str(s["attrs"]["scan"]) for s in scans]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise ScanError(scan_files[names.index(dup[0])], f"scan {dup[0]} given twice")
    scans.sort(key=lambda s: (float(s["attrs"]["start_time"]), str(s["attrs"]["scan"])))
    bands = occ.aggregate_run(scans)
    overview = occ.scan_overview(scans)
    emitters = load_emitters(emitters_path, bands_dir=bands_dir, bands=list(bands))
    prev = read_previous(previous) if previous else None

    occ_dir = os.path.join(outdir, "occupancy")
    rep_dir = os.path.join(outdir, "report")
    os.makedirs(occ_dir, exist_ok=True)
    os.makedirs(rep_dir, exist_ok=True)
    occ.write_csv(os.path.join(occ_dir, "run.csv"), occ.run_table(bands))
    occ.write_run_h5(os.path.join(occ_dir, "run.h5"), bands, overview,
                     attrs={"emitters_json": json.dumps(emitters), "range_fraction": float(threshold)})

    figs = {"band": {}, "scan": {}, "kurtosis": {}, "change": {}}
    for band, agg in bands.items():
        p = os.path.join(rep_dir, f"band_{band}.png")
        rp.band_occupancy(p, band, agg, emitters)
        figs["band"][band] = p
        if prev is not None:
            p = os.path.join(rep_dir, f"change_{band}.png")
            before = previous_on_grid(prev, band, agg["freq"])
            rp.change_plot(p, band, agg["freq"], fraction(agg["flagged"], agg["samples"]), before)
            figs["change"][band] = (p, before)
    sk_summaries = {}
    for s in scans:
        name = str(s["attrs"]["scan"])
        p = os.path.join(rep_dir, f"scan_{name}.png")
        rp.scan_image(p, s)
        figs["scan"][name] = p
        p = os.path.join(rep_dir, f"kurtosis_{name}.png")
        sk = s.get("sk") or {"edges": np.linspace(0, 3, 2), "counts": np.zeros((1, 1), np.int64), "attrs": {}}
        rp.sk_diagnostic(p, sk, title=f"Spectral kurtosis of scan {name}: measured vs expected")
        sk_summaries[name] = rp.sk_summary(sk)[0]
        figs["kurtosis"][name] = p

    ranges = annotated_ranges(bands, emitters, threshold)
    page = render_page(outdir, scans, bands, overview, ranges, figs, sk_summaries, prev,
                       threshold, previous)
    index = os.path.join(rep_dir, "index.html")
    with atomic_output(index) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        fh.write(page)
    return index


def _img(path, alt):
    with open(path, "rb") as fh:
        b64 = base64.b64encode(fh.read()).decode("ascii")
    return f'<img src="data:image/png;base64,{b64}" alt="{html.escape(alt)}">'


CSS = """
:root { --paper:#fbf8f1; --ink:#23202b; --muted:#6c6577; --line:#d9d2c3; --card:#ffffff;
        --accent:#b8503f; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; }
header { padding: 22px 32px 14px; border-bottom: 3px solid var(--ink); }
header h1 { margin:0; font-size: 26px; letter-spacing: .01em; }
header .sub { color: var(--muted); margin-top: 4px; }
nav { padding: 8px 32px; border-bottom: 1px solid var(--line); font-size: 14px; }
nav a { margin-right: 18px; color: var(--ink); }
main { padding: 8px 32px 40px; max-width: 1500px; }
h2 { margin: 30px 0 8px; font-size: 20px; border-bottom: 1px solid var(--line); padding-bottom: 4px; }
h3 { margin: 18px 0 6px; font-size: 16px; }
.cards { display:flex; flex-wrap:wrap; gap: 12px; margin: 14px 0; }
.card { background: var(--card); border: 1px solid var(--line); border-radius: 6px; padding: 10px 16px;
        min-width: 150px; }
.card .v { font-size: 26px; font-weight: 700; }
.card .k { color: var(--muted); font-size: 13px; }
.card.hot .v { color: var(--accent); }
table { border-collapse: collapse; margin: 8px 0 14px; font-size: 13.5px; background: var(--card); }
th, td { border-bottom: 1px solid var(--line); padding: 4px 10px; text-align: right; vertical-align: top; }
th { background: #efe9dc; text-align: right; font-weight: 600; }
td.l, th.l { text-align: left; }
.bar { display:inline-block; height: 11px; background: var(--accent); vertical-align: middle;
       border-radius: 2px; margin-right: 6px; }
.causes td.l { min-width: 130px; }
.swatch { display:inline-block; width: 11px; height: 11px; border-radius: 2px; margin-right: 6px;
          vertical-align: -1px; }
img { max-width: 100%; height: auto; border: 1px solid var(--line); border-radius: 4px; background: var(--paper); }
.note { color: var(--muted); font-size: 13px; max-width: 1100px; }
.warn { color: var(--accent); font-weight: 600; }
.em { font-size: 12.5px; }
.em span.p { color: #4f7a3a; }
details { margin: 6px 0 14px; }
summary { cursor: pointer; font-weight: 600; }
.scan { margin-bottom: 26px; }
"""


def _table(head, rows, left=(0,), cls=""):
    out = [f'<table class="{cls}"><thead><tr>']
    out += [f'<th class="{"l" if i in left else ""}">{html.escape(str(h))}</th>' for i, h in enumerate(head)]
    out.append("</tr></thead><tbody>")
    for r in rows:
        out.append("<tr>" + "".join(
            f'<td class="{"l" if i in left else ""}">{c}</td>' for i, c in enumerate(r)) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _emitter_cell(ems, limit=3):
    if not ems:
        return '<span class="note">none known</span>'
    parts = []
    for e in ems[:limit]:
        cls = "p" if e["kind"] == "protected" else ""
        label = html.escape(e["name"]) + (" (protected)" if e["kind"] == "protected" else "")
        if e.get("site"):
            label += " [site]"
        parts.append(f'<span class="{cls}" title="{html.escape(e["source"])}">{label}</span>')
    more = f" +{len(ems) - limit} more" if len(ems) > limit else ""
    return '<span class="em">' + "; ".join(parts) + more + "</span>"


def render_page(outdir, scans, bands, overview, ranges, figs, sk_summaries, prev, threshold, previous):
    """The review page as one HTML string (see :func:`build_review`)."""
    from rfisieve.review.plots import CAUSE_COLOURS

    tot = run_totals(overview)
    frac = tot["flagged"] / tot["samples"] if tot["samples"] else float("nan")
    esc = html.escape
    h = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
         '<meta name="viewport" content="width=device-width, initial-scale=1">',
         f"<title>rfisieve review: {esc(os.path.basename(os.path.abspath(outdir)))}</title>",
         f"<style>{CSS}</style></head><body>"]
    h.append(f"<header><h1>Morning review of {esc(os.path.abspath(outdir))}</h1>"
             f'<div class="sub">Observed {esc(_utc(tot["start"]))} to {esc(_utc(tot["stop"]))} &middot; '
             f"page written {esc(_dt.datetime.now(_dt.timezone.utc).strftime('%Y-%m-%d %H:%M UTC'))} "
             f"by rfisieve review</div></header>")
    nav = [("overview", "Overview"), ("ranges", "Most occupied ranges"), ("bands", "By frequency")]
    if prev is not None:
        nav.append(("change", "Change since previous run"))
    nav += [("scans", "Scans"), ("products", "Products"), ("kurtosis", "Kurtosis check"), ("bits", "Mask bits")]
    h.append("<nav>" + "".join(f'<a href="#{a}">{esc(t)}</a>' for a, t in nav) + "</nav><main>")

    # --- overview -----------------------------------------------------------
    h.append('<h2 id="overview">Overview</h2><div class="cards">')
    cards = [("flagged", _pct(frac), "hot"), ("scans", str(tot["scans"]), ""),
             ("bands", ", ".join(tot["bands"]) or "none", ""), ("hours observed", f"{tot['hours']:.2f} h", ""),
             ("samples", f"{tot['samples']:,}", "")]
    bad_sk = [n for n, s in sk_summaries.items() if s.get("ratio") is not None and not 0.85 <= s["ratio"] <= 1.15]
    cards.append(("kurtosis check", "check M, N, d" if bad_sk else "ok", "hot" if bad_sk else ""))
    for k, v, cls in cards:
        h.append(f'<div class="card {cls}"><div class="v">{esc(v)}</div><div class="k">{esc(k)}</div></div>')
    h.append("</div>")
    rows = []
    for k, name in enumerate(BIT_NAMES):
        fb = tot["bits"][k] / tot["samples"] if tot["samples"] else float("nan")
        w = 0 if not np.isfinite(fb) else max(1 if tot["bits"][k] else 0, int(round(300 * fb)))
        rows.append([f'<span class="swatch" style="background:{CAUSE_COLOURS[name]}"></span>{esc(name)}',
                     f"{int(tot['bits'][k]):,}",
                     f'<span class="bar" style="width:{w}px;background:{CAUSE_COLOURS[name]}"></span>{_pct(fb)}'])
    rows.append(["<b>any cause</b>", f"<b>{tot['flagged']:,}</b>",
                 f'<span class="bar" style="width:{int(round(300 * np.nan_to_num(frac)))}px"></span><b>{_pct(frac)}</b>'])
    h.append(_table(["cause", "samples", "fraction of all samples"], rows, left=(0, 2), cls="causes"))
    h.append('<p class="note">A sample with several causes counts once under "any cause" and once under '
             'each of its causes, so the cause rows can add up to more than the total.</p>')
    if bad_sk:
        h.append(f'<p class="warn">The spectral kurtosis of {esc(", ".join(bad_sk))} does not follow the '
                 'expected distribution: M, N or d may be wrong for these scans (see Kurtosis check).</p>')

    # --- ranges -------------------------------------------------------------
    h.append(f'<h2 id="ranges">Most occupied channel ranges</h2><p class="note">Contiguous runs of '
             f"channels with at least {100 * threshold:.0f} % of samples flagged over the whole run, "
             "largest loss first, with the known emitters and protected bands they overlap "
             "(hover a name for its source).</p>")
    rows = []
    for r in ranges[:TOP_RANGES]:
        rows.append([esc(r["band"]), f"{r['start_mhz']:.3f}", f"{r['stop_mhz']:.3f}",
                     str(r["channels"]), _pct(r["mean_fraction"], 1), _pct(r["peak_fraction"], 1),
                     esc(r["cause"]), _emitter_cell(r["emitters"])])
    if rows:
        h.append(_table(["band", "from MHz", "to MHz", "channels", "mean flagged", "peak", "first cause",
                         "known emitters"], rows, left=(0, 6, 7)))
        if len(ranges) > TOP_RANGES:
            h.append(f'<p class="note">{len(ranges) - TOP_RANGES} smaller ranges not shown '
                     "(`rfisieve summary` lists them).</p>")
    else:
        h.append('<p class="note">No channel range reaches that fraction.</p>')

    # --- by frequency -------------------------------------------------------
    h.append('<h2 id="bands">Occupancy by frequency</h2><p class="note">Run total per channel, each flagged '
             "sample coloured by its first cause in bit order (input, invalid, static, sk, sumthreshold, "
             "grown, cut); black line = any cause. Above each plot: known emitters (blue) "
             "and protected bands (green, also hatched in the plot).</p>")
    for band in bands:
        h.append(f"<h3>Band {esc(band)}</h3>" + _img(figs["band"][band], f"occupancy of band {band}"))

    # --- change -------------------------------------------------------------
    if prev is not None:
        h.append(f'<h2 id="change">Change since the previous run</h2><p class="note">Compared with '
                 f"{esc(str(previous))}; channels matched by centre frequency.</p>")
        for band, agg in bands.items():
            p, before = figs["change"][band]
            now = fraction(agg["flagged"], agg["samples"])
            d = now - before
            h.append(f"<h3>Band {esc(band)}</h3>" + _img(p, f"change of occupancy, band {band}"))
            ok = np.isfinite(d)
            if not ok.any():
                h.append('<p class="note">The previous run has no channels of this band.</p>')
                continue
            order = np.argsort(-np.abs(np.where(ok, d, 0)))[:8]
            rows = [[f"{agg['freq'][i] / 1e6:.3f}", _pct(before[i], 1), _pct(now[i], 1),
                     f"{100 * d[i]:+.1f}"] for i in order if ok[i] and d[i] != 0]
            h.append(f'<p class="note">{int(ok.sum())} of {len(d)} channels compared; mean change '
                     f"{100 * np.nanmean(d):+.2f} percentage points.</p>")
            if rows:
                h.append(_table(["channel MHz", "before", "now", "change (points)"], rows, left=()))

    # --- scans --------------------------------------------------------------
    h.append('<h2 id="scans">Scans</h2>')
    rows = []
    for r in overview:
        f = r["flagged"] / r["samples"] if r["samples"] else float("nan")
        bits = [_pct(b / r["samples"] if r["samples"] else float("nan"), 1) for b in r["bits"]]
        rows.append([esc(r["name"]), esc(r["band"]), esc(_utc(r["start_time"])), f"{r['hours']:.2f}",
                     str(r["ntime"]), str(r["nchan"]), str(r["nprod"]), f"<b>{_pct(f, 1)}</b>", *bits])
    h.append(_table(["scan", "band", "start", "hours", "dumps", "channels", "products", "flagged",
                     *BIT_NAMES], rows, left=(0, 1, 2)))
    for s in scans:
        name = str(s["attrs"]["scan"])
        h.append(f'<div class="scan"><h3>{esc(name)}</h3>' + _img(figs["scan"][name], f"occupancy image of {name}")
                 + "</div>")

    # --- products -----------------------------------------------------------
    h.append('<h2 id="products">Products</h2><p class="note">Over all scans; one row per product.</p>')
    prod = {}
    for s in scans:
        for j, p in enumerate(s["products"]):
            e = prod.setdefault(p, {"scans": 0, "samples": 0, "flagged": 0, "bits": np.zeros(len(BIT_NAMES), np.int64)})
            e["scans"] += 1
            e["samples"] += int(s["product/samples"][j])
            e["flagged"] += int(s["product/flagged"][j])
            e["bits"] += np.asarray(s["product/bits"])[:, j]
    rows = []
    for p, e in sorted(prod.items(), key=lambda kv: -kv[1]["flagged"] / max(kv[1]["samples"], 1)):
        kind = "auto" if len(set(p.split("-"))) == 1 else "cross"
        rows.append([esc(p), kind, str(e["scans"]), f"{e['samples']:,}",
                     f"<b>{_pct(e['flagged'] / e['samples'] if e['samples'] else np.nan, 2)}</b>",
                     *[_pct(b / e["samples"] if e["samples"] else np.nan, 2) for b in e["bits"]]])
    h.append(_table(["product", "kind", "scans", "samples", "flagged", *BIT_NAMES], rows, left=(0, 1)))

    # --- kurtosis -----------------------------------------------------------
    h.append('<h2 id="kurtosis">Kurtosis check</h2><p class="note">The measured spectral kurtosis of the '
             "auto products over the density expected for Gaussian noise with the M, N and d the "
             "flagger used; dashed lines: its thresholds. Clean data follows the curve in the middle; "
             "a histogram much wider or narrower than the curve (width ratio far from 1) or off-centre "
             "means M, N or d is wrong for the scan.</p>")
    rows = []
    for name, sm in sk_summaries.items():
        ratio = sm.get("ratio")
        flag = "" if ratio is None or 0.85 <= ratio <= 1.15 else ' class="warn"'
        rows.append([esc(name), esc(str(sm.get("mode") or "-")), esc(str(sm.get("m"))), esc(str(sm.get("n"))),
                     esc(str(sm.get("d"))), esc(f"{sm['lower']:.4f}" if sm.get("lower") is not None else "-"),
                     esc(f"{sm['upper']:.4f}" if sm.get("upper") is not None else "-"),
                     f"{sm['median']:.4f}" if sm.get("median") is not None else "-",
                     f"<span{flag}>{ratio:.2f}</span>" if ratio is not None else "-",
                     _pct(sm.get("outside"), 2) if sm.get("outside") is not None else "-"])
    h.append(_table(["scan", "mode", "M", "N", "d", "lower", "upper", "median SK", "width ratio",
                     "outside thresholds"], rows, left=(0, 1)))
    notes = sorted({sm["note"] for sm in sk_summaries.values() if sm.get("note")})
    if notes:
        h.append('<p class="note">Expected curve: ' + esc("; ".join(notes)) + ".</p>")
    for s in scans:
        name = str(s["attrs"]["scan"])
        h.append(f"<h3>{esc(name)}</h3>" + _img(figs["kurtosis"][name], f"kurtosis diagnostic of {name}"))

    # --- bits ---------------------------------------------------------------
    from rfisieve.bits import BIT_TABLE

    h.append('<h2 id="bits">Mask bits</h2>')
    h.append(_table(["bit", "value", "cause", "meaning"],
                    [[str(b), str(v), f'<span class="swatch" style="background:{CAUSE_COLOURS[n]}"></span>{esc(n)}',
                      esc(m)] for b, v, n, m in BIT_TABLE], left=(2, 3)))
    h.append('<p class="note">Tables: occupancy/run.csv (per band and channel), occupancy/&lt;scan&gt;.csv, '
             "and the exact counts in occupancy/*.h5.</p>")
    h.append("</main></body></html>")
    return "\n".join(h)


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
    p.add_argument("--scans", nargs="+", required=True, metavar="OCC.h5",
                   help="per-scan occupancy files (OUTDIR/occupancy/<scan>.h5)")
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

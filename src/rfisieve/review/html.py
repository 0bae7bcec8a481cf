"""The review page's HTML: its style, tables and sections, from the numbers and figures
that :func:`rfisieve.review.page.build_review` gathered (see that module for the page's
order and its figures)."""

import base64
import datetime as _dt
import html
import os
import urllib.parse

import numpy as np

from rfisieve.review.emitters import where_from
from rfisieve.review.occupancy import BIT_NAMES, fraction
from rfisieve.textfmt import count_noun as _count
from rfisieve.textfmt import pct as _pct
from rfisieve.textfmt import utc_minutes as _utc


#: Ranges listed in the page's table of most occupied ranges.
TOP_RANGES = 15
#: Fractions closer than this count as unchanged (run.csv keeps 10 significant digits).
SAME = 1e-9
#: Most scans given an SK figure of their own (those whose check fails); every scan is
#: in the pooled figure of its band and SK settings and in the table.
MAX_SCAN_SK_FIGURES = 8

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


def _img(path, alt):
    with open(path, "rb") as fh:
        b64 = base64.b64encode(fh.read()).decode("ascii")
    return f'<img src="data:image/png;base64,{b64}" alt="{html.escape(alt)}">'


#: Nights of up to this many scans get every figure inside the page (one file to copy or
#: mail).  A scan's figure is about 0.35 MiB, 0.47 MiB in the page: a night of 24 scans
#: gave an 11 MiB page, and a night of a few hundred scans would give a page of over a
#: hundred MiB that a browser opens slowly.  Beyond it the scans' figures are linked: the
#: files beside the page (report/scan_<name>.png), loaded as the reader scrolls to them.
EMBED_SCANS = 48


def _linked_img(path, alt):
    """An image that stays a file beside the page: a relative link, loaded when scrolled to."""
    src = html.escape(urllib.parse.quote(os.path.basename(path)), quote=True)
    return f'<img src="{src}" loading="lazy" alt="{html.escape(alt)}">'


CSS = """
:root { --paper:#fbf8f1; --ink:#23202b; --muted:#6c6577; --line:#d9d2c3; --card:#ffffff;
        --total:#6c6577; --alert:#fff1c9; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; }
header { padding: 22px 32px 14px; border-bottom: 3px solid var(--ink); }
header h1 { margin:0; font-size: 26px; letter-spacing: .01em; }
header .sub { color: var(--muted); margin-top: 4px; }
nav { padding: 8px 32px; border-bottom: 1px solid var(--line); font-size: 14px; }
nav a { margin-right: 18px; color: var(--ink); white-space: nowrap; }
main { padding: 8px 32px 40px; max-width: 1500px; }
h2 { margin: 30px 0 8px; font-size: 20px; border-bottom: 1px solid var(--line); padding-bottom: 4px; }
h3 { margin: 18px 0 6px; font-size: 16px; }
.cards { display:flex; flex-wrap:wrap; gap: 12px; margin: 14px 0; }
.card { background: var(--card); border: 1px solid var(--line); border-radius: 6px; padding: 10px 16px;
        min-width: 150px; }
.card .v { font-size: 26px; font-weight: 700; white-space: nowrap; }
.card .k { color: var(--muted); font-size: 13px; }
.card.alert { background: var(--alert); border: 2px solid var(--ink); }
.wide { overflow-x: auto; max-width: 100%; }
table { border-collapse: collapse; margin: 8px 0 14px; font-size: 13.5px; background: var(--card); }
th, td { border-bottom: 1px solid var(--line); padding: 4px 10px; text-align: right; vertical-align: top;
         white-space: nowrap; }
th { background: #efe9dc; text-align: right; font-weight: 600; }
td.l, th.l { text-align: left; }
td.w { white-space: normal; min-width: 260px; max-width: 640px; }
.bar { display:inline-block; height: 11px; background: var(--total); vertical-align: middle;
       border-radius: 2px; margin-right: 6px; }
.swatch { display:inline-block; width: 11px; height: 11px; border-radius: 2px; margin-right: 6px;
          vertical-align: -1px; }
img { max-width: 100%; height: auto; border: 1px solid var(--line); border-radius: 4px; background: var(--paper); }
.note { color: var(--muted); font-size: 13px; max-width: 1100px; }
.warn { background: var(--alert); border-left: 4px solid var(--ink); padding: 6px 10px; font-weight: 600;
        max-width: 1100px; }
.em { font-size: 12.5px; }
.em span.p { color: #4f7a3a; }
.side { display:flex; gap: 24px; align-items: flex-start; flex-wrap: wrap; }
code { background: #efe9dc; padding: 0 4px; border-radius: 3px; }
.scan { margin-bottom: 26px; }
"""


def _table(head, rows, left=(0,), cls="", wrap=()):
    """An HTML table; cells never wrap except the columns listed in ``wrap`` (long prose)."""
    out = [f'<div class="wide"><table class="{cls}"><thead><tr>']
    out += [f'<th class="{"l" if i in left else ""}">{html.escape(str(h))}</th>' for i, h in enumerate(head)]
    out.append("</tr></thead><tbody>")
    for r in rows:
        out.append("<tr>" + "".join(
            f'<td class="{"l" if i in left else ""}{" w" if i in wrap else ""}">{c}</td>'
            for i, c in enumerate(r)) + "</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


def _emitter_cell(ems, limit=3):
    if not ems:
        return '<span class="note">none known</span>'
    parts = []
    for e in ems[:limit]:
        cls = "p" if e["kind"] == "protected" else ""
        label = html.escape(e["name"]) + (" (protected)" if e["kind"] == "protected" else "")
        tip = f"{e['source']} [{where_from(e)}]"
        parts.append(f'<span class="{cls}" title="{html.escape(tip)}">{label}</span>')
    more = f" +{len(ems) - limit} more" if len(ems) > limit else ""
    return '<span class="em">' + "; ".join(parts) + more + "</span>"


def _mhz(a, b):
    return f"{a:.3f}\u2013{b:.3f}"


def _settings_rows(flat, keys=None):
    from rfisieve.review.provenance import fmt_value

    return [[f"<code>{html.escape(k)}</code>", html.escape(fmt_value(flat[k]))] for k in (keys or sorted(flat))]


def _change_section(h, bands, figs, prev, previous, ctx):
    """The change section: per band, the settings diff beside the occupancy change."""
    from rfisieve.review import provenance as pv

    esc = html.escape
    h.append('<h2 id="change">Change since the previous run</h2>')
    if prev is None:
        h.append('<p class="note">No previous run given, so nothing is compared. To compare with an earlier '
                 "night, give its table: <code>previous_run: /path/to/earlier-outdir/occupancy/run.csv</code> "
                 "in the run config, or <code>rfisieve review OUTDIR --scans ... --previous "
                 "EARLIER/occupancy/run.csv</code>. Channels are matched by centre frequency; the earlier "
                 "run's settings are read from the <code>run.h5</code> beside that file (or its mask files) "
                 "and any difference is listed here.</p>")
        return
    where = ctx.get("prev_where")
    h.append(f'<p class="note">Compared with {esc(str(previous))}; channels matched by centre frequency. '
             + (f"Previous settings read from {esc(str(where))}." if where else
                "The previous run's settings were not found (no run.h5 with them beside that file, no "
                "flags/ directory), so only occupancy is compared.") + "</p>")
    for band, agg in bands.items():
        p, before = figs["change"][band]
        now = fraction(agg["flagged"], agg["samples"])
        d = now - before
        ok = np.isfinite(d)
        old = (ctx.get("prev_settings") or {}).get(band)
        diff = pv.settings_diff(old, ctx["settings"].get(band)) if old is not None else None
        if diff is None:
            stext = "previous settings unknown"
        elif not diff:
            stext = "settings unchanged"
        else:
            stext = "settings changed: " + "; ".join(f"{k} {a} \u2192 {b}" for k, a, b in diff)
        if not ok.any():
            h.append(f"<p><b>Band {esc(band)}</b>: the previous run has no channels of this band; {esc(stext)}.</p>")
            continue
        if not np.any(np.abs(d[ok]) > SAME):
            h.append(f"<p><b>Band {esc(band)}</b>: occupancy unchanged over the {int(ok.sum())} channels "
                     f"compared; {esc(stext)}.</p>")
            continue
        h.append(f"<h3>Band {esc(band)}</h3>")
        up, down = int(np.sum(d[ok] > SAME)), int(np.sum(d[ok] < -SAME))
        occ_rows = [["channels compared", f"{int(ok.sum())} of {len(d)}"],
                    ["mean change", f"{100 * np.nanmean(d):+.2f} points"],
                    ["whole band, before \u2192 now",
                     f"{_pct(np.nanmean(before[ok]), 2)} \u2192 {_pct(np.nanmean(now[ok]), 2)}"],
                    ["channels more / less flagged", f"{up} / {down}"]]
        set_rows = ([[f"<code>{esc(k)}</code>", esc(a), esc(b)] for k, a, b in diff] if diff else
                    [[esc(stext), "", ""]])
        h.append('<div class="side"><div><b>Occupancy</b>' + _table(["", "value"], occ_rows) + "</div><div>"
                 "<b>Settings</b>" + _table(["setting", "previous", "now"], set_rows) + "</div></div>")
        h.append(_img(p, f"change of occupancy, band {band}"))
        order = np.argsort(-np.abs(np.where(ok, d, 0)))[:8]
        rows = [[f"{agg['freq'][i] / 1e6:.3f}", _pct(before[i], 1), _pct(now[i], 1),
                 f"{100 * d[i]:+.1f}"] for i in order if ok[i] and abs(d[i]) > SAME]
        if rows:
            h.append(_table(["channel MHz", "before", "now", "change (points)"], rows, left=()))


def _failed_section(h, ctx, nscans, names=()):
    esc = html.escape
    failed, note = ctx.get("failed"), ctx.get("failed_note")
    if failed:
        # a scan listed as failed that has a mask on this page was flagged by a later run
        later = [r for r in failed if r["scan"] in names]
        failed = [r for r in failed if r["scan"] not in names]
        if later:
            h.append(f'<p class="note">{esc(", ".join(r["scan"] for r in later))}: listed in {esc(note)} as '
                     "failed, but flagged since (shown below).</p>")
    h.append('<h2 id="failed">Failed or skipped scans</h2>')
    if failed is None:
        h.append(f'<p class="note">{esc(note)}.</p>')
    elif not failed:
        h.append(f'<p class="note">None: every scan of the night was flagged ({nscans} on this page; '
                 f"{esc(note)} lists no failure).</p>")
    else:
        h.append(f'<p class="warn">{_count(len(failed), "scan")} failed and '
                 f'{"is" if len(failed) == 1 else "are"} missing from the rest of this page: '
                 f'{"its" if len(failed) == 1 else "their"} data are not flagged.</p>')
        h.append(_table(["scan", "stage", "reason", "file"],
                        [[f"<b>{esc(r['scan'])}</b>", esc(r["stage"]), esc(r["reason"]), esc(r["path"])]
                         for r in failed], left=(0, 1, 2, 3), wrap=(2,)))


#: Ranges of a band config shown with what was flagged inside them: key, title, what it means.
RANGE_KEYS = (("protect", "Protected ranges", "how much was flagged inside them anyway"),
              ("known_bad", "Known-bad ranges", "how much was flagged inside them, by cause"))


def _protected_section(h, band, agg, settings):
    """Protected (band-config key ``protect``) and known-bad ranges of a band, and what was
    flagged inside them; nothing when the band config has neither."""
    for key, title, what in RANGE_KEYS:
        _range_table(h, band, agg, settings, key, title, what)


def _range_table(h, band, agg, settings, key, title, what):
    from rfisieve.review import provenance as pv

    esc = html.escape
    prot = pv.protected_ranges(settings, key)
    if not prot:
        return
    rows = []
    for r in prot:
        n, fr, per_bit = pv.flagged_inside(agg["freq"], agg["flagged"], agg["samples"], agg["bits"],
                                           r["start_mhz"], r["stop_mhz"])
        causes = "" if per_bit is None else ", ".join(
            f"{name} {_pct(v, 1)}" for name, v in zip(BIT_NAMES, per_bit) if v > 0)
        rows.append([_mhz(r["start_mhz"], r["stop_mhz"]), esc(r["reason"]) or "-", esc(r["source"]) or "-",
                     str(n), f"<b>{_pct(fr, 2)}</b>" if n else "no channel inside", esc(causes) or "-"])
    h.append(f"<p><b>{esc(title)} of band {esc(band)}</b> (band config <code>{esc(key)}</code>) and "
             f"{esc(what)}:</p>")
    head = ["MHz", "reason", "source", "channels", "flagged inside", "by cause"]
    if not any(r["source"] for r in prot):   # known_bad entries carry no source: no empty column
        head.pop(2)
        rows = [r[:2] + r[3:] for r in rows]
        h.append(_table(head, rows, left=(1, 4), wrap=(1,)))
        return
    h.append(_table(head, rows, left=(1, 2, 5), wrap=(1, 2)))


def _emitter_table(h, band, shown):
    esc = html.escape
    if not shown:
        return
    rows = []
    for e in shown:
        src = esc(e["source"])
        for where, other in e.get("also", []):
            src += f'<br><span class="note">also {esc(where)}: {esc(other)}</span>'
        rows.append([esc(e["name"]), _mhz(e["start_mhz"], e["stop_mhz"]),
                     "protected" if e["kind"] == "protected" else "emitter", esc(where_from(e)), src])
    h.append(f"<details><summary>Known emitters and protected bands drawn above band {esc(band)}, with their "
             "sources</summary>" + _table(["name", "MHz", "kind", "listed in", "source"], rows,
                                         left=(0, 2, 3, 4), wrap=(4,)) + "</details>")


def _provenance_section(h, scans, ctx, sk_summaries):
    from rfisieve.review import provenance as pv

    esc = html.escape
    h.append('<h2 id="provenance">What produced these flags</h2>')
    versions = sorted({p["version"] for p in ctx["provs"].values() if p.get("version")})
    h.append(f'<p>Masks written by rfisieve {esc(", ".join(versions) or "(version not recorded)")}; this page by '
             f"rfisieve {esc(ctx['version'])}.</p>")
    missing = [n for n, p in ctx["provs"].items() if p.get("problem") or p.get("settings") is None]
    if missing:
        h.append(f'<p class="note">Settings not recorded for {esc(", ".join(missing))} '
                 f"({esc(ctx['provs'][missing[0]].get('problem') or 'no band_settings attribute')}).</p>")
    by_band = {}
    for s in scans:
        name, band = str(s["attrs"]["scan"]), str(s["attrs"]["band"])
        p = ctx["provs"][name]
        if p.get("settings") is not None:
            by_band.setdefault(band, []).append((name, p))
    if by_band:
        flat = {band: pv.shown_settings(lst[0][1]["settings"]) for band, lst in by_band.items()}
        keys = sorted(set().union(*flat.values()))
        rows = []
        for k in keys:
            vals = [pv.fmt_value(flat[b][k]) if k in flat[b] else "-" for b in by_band]
            rows.append([f"<code>{esc(k)}</code>", *[esc(v) for v in vals]])
        notes = []
        for band, lst in by_band.items():
            differ = [n for n, p in lst[1:] if pv.settings_diff(lst[0][1]["settings"], p["settings"])]
            path = lst[0][1].get("band_config_path") or "?"
            notes.append(f"band {esc(band)}: {esc(path)}, " + (
                f"scans {esc(', '.join(differ))} used other settings (see their mask files)" if differ
                else f"the same for {'all ' if len(lst) > 1 else ''}{_count(len(lst), 'scan')}"))
        h.append("<h3>Band settings as used</h3><p class=\"note\">Read from the mask files (attribute "
                 "<code>band_settings</code>); " + "; ".join(notes) + ". Known-bad and protected ranges and "
                 "emitter lists are shown with each band above.</p>")
        h.append(_table(["setting", *[f"band {b}" for b in by_band]], rows, left=tuple(range(len(by_band) + 1))))
    h.append("<h3>Spectral kurtosis thresholds used</h3>")
    rows = []
    for name, sm in sk_summaries.items():
        def num(key, fmt):
            v = sm.get(key)
            return "-" if v is None else format(float(v), fmt)
        rows.append([esc(name), esc(str(sm.get("mode") or "-")), esc(str(sm.get("m"))), esc(str(sm.get("n"))),
                     esc(str(sm.get("d"))), num("pfa", ".3g"), esc(str(sm.get("method") or "-")),
                     num("lower", ".4f"), num("upper", ".4f")])
    h.append(_table(["scan", "mode", "M", "N", "d", "PFA per tail", "method", "lower", "upper"], rows, left=(0, 1, 6)))


def render_page(outdir, scans, bands, overview, ranges, figs, sk_summaries, prev, threshold, previous, ctx=None):
    """The review page as one HTML string (see :func:`build_review`)."""
    from rfisieve.review.palette import CAUSE_COLOURS

    ctx = ctx or {"provs": {}, "settings": {}, "failed": None, "failed_note": "failed_scans.csv not read",
                  "prev_settings": None, "prev_where": None, "version": "?"}
    tot = run_totals(overview)
    frac = tot["flagged"] / tot["samples"] if tot["samples"] else float("nan")
    esc = html.escape
    nfailed = len([r for r in ctx["failed"] or [] if r["scan"] not in {o["name"] for o in overview}])
    h = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
         '<meta name="viewport" content="width=device-width, initial-scale=1">',
         f"<title>rfisieve review: {esc(os.path.basename(os.path.abspath(outdir)))}</title>",
         f"<style>{CSS}</style></head><body>"]
    versions = sorted({p["version"] for p in ctx["provs"].values() if p.get("version")})
    h.append(f"<header><h1>Morning review of {esc(os.path.abspath(outdir))}</h1>"
             f'<div class="sub">Observed {esc(_utc(tot["start"]))} to {esc(_utc(tot["stop"]))} (all times UTC) '
             f"&middot; flagged by rfisieve {esc(', '.join(versions) or '?')} &middot; page written "
             f"{esc(_dt.datetime.now(_dt.timezone.utc).strftime('%Y-%m-%d %H:%M UTC'))}</div></header>")
    nav = [("overview", "Overview"), ("failed", "Failed scans"), ("night", "Night"),
           ("ranges", "Most occupied ranges"), ("bands", "By frequency"), ("change", "Change"),
           ("scans", "Scans"), ("products", "Products"), ("kurtosis", "Kurtosis check"),
           ("provenance", "Settings"), ("bits", "Mask bits")]
    h.append("<nav>" + "".join(f'<a href="#{a}">{esc(t)}</a>' for a, t in nav) + "</nav><main>")

    # --- overview -----------------------------------------------------------
    h.append('<h2 id="overview">Overview</h2><div class="cards">')
    bad_sk = {n: s for n, s in sk_summaries.items() if s.get("verdict") == "check"}
    before = ctx.get("prev_total")
    cards = [("flagged" + (f" (previous run {_pct(before)})" if before is not None else ""), _pct(frac), ""),
             ("scans flagged" + (f", {nfailed} failed" if nfailed else ""), str(tot["scans"]),
              "alert" if nfailed else ""),
             ("bands", ", ".join(tot["bands"]) or "none", ""), ("hours observed", f"{tot['hours']:.2f} h", ""),
             ("samples", f"{tot['samples']:,}", ""),
             (f"kurtosis check ({len(bad_sk)} of {_count(len(sk_summaries), 'scan')})" if bad_sk
              else "kurtosis check",
              "check" if bad_sk else ("ok" if any(s.get("verdict") == "ok" for s in sk_summaries.values())
                                      else "n/a"), "alert" if bad_sk else "")]
    for k, v, cls in cards:
        h.append(f'<div class="card {cls}"><div class="v">{esc(v)}</div><div class="k">{esc(k)}</div></div>')
    h.append("</div>")
    if prev is not None and ctx.get("prev_settings"):
        from rfisieve.review.provenance import settings_diff

        changed = []
        for band in bands:
            old = ctx["prev_settings"].get(band)
            diff = settings_diff(old, ctx["settings"].get(band)) if old is not None else []
            if diff:
                changed.append(f"band {esc(band)}: " + "; ".join(f"{esc(k)} {esc(a)} \u2192 {esc(b)}"
                                                               for k, a, b in diff))
        h.append('<p>Settings since the previous run: ' + ("; ".join(changed) if changed else "unchanged")
                 + ' (<a href="#change">change</a>).</p>')
    if bad_sk:
        items = "".join(f"<li>{esc(n)}: {esc('; '.join(s['reasons']))}</li>" for n, s in bad_sk.items())
        h.append(f'<div class="warn">Kurtosis check: look at these scans (see Kurtosis check)<ul>{items}</ul></div>')
    _failed_section(h, ctx, tot["scans"], {r["name"] for r in overview})
    rows = []
    for k, name in enumerate(BIT_NAMES):
        fb = tot["bits"][k] / tot["samples"] if tot["samples"] else float("nan")
        w = 0 if not np.isfinite(fb) else max(1 if tot["bits"][k] else 0, int(round(300 * fb)))
        rows.append([f'<span class="swatch" style="background:{CAUSE_COLOURS[name]}"></span>{esc(name)}',
                     f"{int(tot['bits'][k]):,}",
                     f'<span class="bar" style="width:{w}px;background:{CAUSE_COLOURS[name]}"></span>{_pct(fb)}'])
    rows.append(["<b>any cause</b>", f"<b>{tot['flagged']:,}</b>",
                 f'<span class="bar" style="width:{int(round(300 * np.nan_to_num(frac)))}px"></span><b>{_pct(frac)}</b>'])
    h.append('<h3>Flagged samples by cause</h3>')
    h.append(_table(["cause", "samples", "share of all samples"], rows, left=(0, 2), cls="causes"))
    h.append('<p class="note">A sample with several causes counts once under "any cause" and once under '
             "each of its causes, so the cause rows can add up to more than the total. Each cause keeps its "
             "colour everywhere on this page; totals (any cause) are grey.</p>")

    # --- night --------------------------------------------------------------
    h.append('<h2 id="night">The night</h2>')
    if figs.get("night"):
        h.append(_img(figs["night"], "flagged fraction over the night per band"))

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
                         "known emitters"], rows, left=(0, 6, 7), wrap=(7,)))
        if len(ranges) > TOP_RANGES:
            h.append(f'<p class="note">{len(ranges) - TOP_RANGES} smaller ranges not shown '
                     "(`rfisieve summary` lists them).</p>")
    else:
        h.append('<p class="note">No channel range reaches that fraction.</p>')

    # --- by frequency -------------------------------------------------------
    h.append('<h2 id="bands">Occupancy by frequency</h2><p class="note">Run total per channel, each flagged '
             "sample coloured by its first cause in bit order (" + esc(", ".join(BIT_NAMES)) + "); black "
             "line = any cause. Above each plot: known emitters (blue-grey) and protected radio-astronomy "
             "bands (green, also hatched in the plot), each named once; the list with sources is below "
             "each plot.</p>")
    for band in bands:
        h.append(f"<h3>Band {esc(band)}</h3>" + _img(figs["band"][band], f"occupancy of band {band}"))
        _emitter_table(h, band, figs.get("shown", {}).get(band, []))
        _protected_section(h, band, bands[band], ctx["settings"].get(band))

    # --- change -------------------------------------------------------------
    _change_section(h, bands, figs, prev, previous, ctx)

    # --- scans --------------------------------------------------------------
    h.append('<h2 id="scans">Scans</h2>')
    rows = []
    for r in overview:
        f = r["flagged"] / r["samples"] if r["samples"] else float("nan")
        bits = [_pct(b / r["samples"] if r["samples"] else float("nan"), 1) for b in r["bits"]]
        rows.append([esc(r["name"]), esc(r["band"]), esc(_utc(r["start_time"])[:-4]), f"{r['hours']:.2f}",
                     str(r["ntime"]), str(r["nchan"]), str(r["nprod"]), f"<b>{_pct(f, 1)}</b>", *bits])
    h.append(_table(["scan", "band", "start, UTC", "hours", "dumps", "chans", "prods", "flagged",
                     *BIT_NAMES], rows, left=(0, 1, 2)))
    h.append('<p class="note">Per scan: the data (power relative to each channel\'s median, read from the '
             "scan file) above the mask (share of each bin flagged by any cause), on the same axes.</p>")
    linked = len(scans) > EMBED_SCANS
    if linked:
        h.append(f'<p class="note">This night has {len(scans)} scans, more than {EMBED_SCANS}: each scan\'s figure '
                 "is the file beside this page (<code>scan_&lt;name&gt;.png</code>), loaded as you scroll to it. "
                 "Copy the whole <code>report/</code> directory to keep them with the page.</p>")
    for s in scans:
        name = str(s["attrs"]["scan"])
        note = figs.get("data_note", {}).get(name, "")
        extra = "" if not note or "product" in note else f'<p class="note">Data not shown: {esc(note)}.</p>'
        h.append(f'<div class="scan"><h3>{esc(name)}</h3>{extra}'
                 + (_linked_img if linked else _img)(figs["scan"][name], f"data and mask of {name}") + "</div>")

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
             "auto products: left, around the thresholds (dashed) over the density expected for Gaussian "
             "noise with the M, N and d the flagger used; right, the whole range of the recorded histogram, "
             "so that both tails show, with the values beyond its end counted in a hatched bar. Clean data "
             "follows the curve; a histogram much wider or narrower than the curve (width ratio far from 1) "
             "means M, N or d is wrong. The check says <b>check</b> whenever values lie beyond the "
             "histogram or a threshold lies outside it.</p>")
    rows = []
    for name, sm in sk_summaries.items():
        ratio = sm.get("ratio")
        verdict = sm.get("verdict") or "-"
        rows.append([esc(name), f"<b>{esc(verdict)}</b>" if verdict == "check" else esc(verdict),
                     esc(str(sm.get("m"))), esc(str(sm.get("n"))), esc(str(sm.get("d"))),
                     esc(f"{sm['lower']:.4f}" if sm.get("lower") is not None else "-"),
                     esc(f"{sm['upper']:.4f}" if sm.get("upper") is not None else "-"),
                     f"{sm['median']:.4f}" if sm.get("median") is not None else "-",
                     f"{ratio:.2f}" if ratio is not None else "-",
                     _pct(sm.get("outside"), 2) if sm.get("outside") is not None else "unknown",
                     f"{sm.get('beyond', 0):,} (\u2265\u00a0{sm['top']:.3g})" if sm.get("top") is not None else "-"])
    h.append(_table(["scan", "check", "M", "N", "d", "lower", "upper", "median SK", "width ratio",
                     "outside thresholds", "beyond histogram"], rows, left=(0, 1)))
    notes = sorted({sm["note"] for sm in sk_summaries.values() if sm.get("note")})
    if notes:
        h.append('<p class="note">Expected curve: ' + esc("; ".join(notes)) + ".</p>")
    nchecks = sum(1 for sm in sk_summaries.values() if sm.get("verdict") == "check")
    if nchecks > MAX_SCAN_SK_FIGURES:
        h.append(f'<p class="note">{nchecks} scans fail the check; the first {MAX_SCAN_SK_FIGURES} are drawn '
                 "below, every one is in the table above and in its band's pooled figure.</p>")
    for heading, path in figs["kurtosis"]:
        h.append(f"<h3>{esc(heading)}</h3>" + _img(path, f"kurtosis diagnostic: {heading}"))

    # --- provenance ---------------------------------------------------------
    _provenance_section(h, scans, ctx, sk_summaries)

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

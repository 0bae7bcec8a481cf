"""Figures of the morning review page (matplotlib, Agg backend), written as PNG files.

Each function takes counts (dicts from :mod:`rfisieve.review.occupancy`) and writes one PNG;
the page embeds them and Snakemake's report registers the same files.  The palette is
the project's own ("moorland"): warm paper background, ink text, one colour per cause.
"""

import datetime as _dt

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402

from rfisieve.review.occupancy import BIT_NAMES, fraction  # noqa: E402

PAPER = "#fbf8f1"
INK = "#23202b"
GRID = "#d9d2c3"

#: One colour per cause bit, in bit order.
CAUSE_COLOURS = {
    "upstream": "#8c8577",      # warm grey
    "invalid": "#3b3355",       # aubergine
    "known": "#c9a227",         # mustard
    "sk": "#1f6f8b",            # petrol blue
    "sumthreshold": "#d1495b",  # coral red
    "grown": "#66a182",         # sage green
    "cut": "#a05195",           # orchid
}
EMITTER_COLOUR = "#7d93ab"
PROTECTED_COLOUR = "#4f7a3a"

#: Occupancy colour map: paper -> straw -> ember -> claret -> night.
EMBER = LinearSegmentedColormap.from_list(
    "rfisieve_ember", ["#fbf8f1", "#f0d9a8", "#e09a5b", "#b8503f", "#6e2540", "#221530"])

STYLE = {
    "figure.facecolor": PAPER, "axes.facecolor": PAPER, "savefig.facecolor": PAPER,
    "axes.edgecolor": INK, "axes.labelcolor": INK, "xtick.color": INK, "ytick.color": INK,
    "text.color": INK, "axes.grid": True, "grid.color": GRID, "grid.linewidth": 0.6,
    "axes.spines.top": False, "axes.spines.right": False, "font.size": 10.5,
    "axes.titlesize": 12, "axes.titleweight": "bold", "axes.titlelocation": "left",
    "legend.frameon": False,
}


def _save(fig, path):
    """Save ``fig`` to ``path`` (PNG) via temp name + rename."""
    import os

    tmp = os.path.join(os.path.dirname(os.path.abspath(path)), f".{os.path.basename(path)}.tmp.png")
    try:
        fig.savefig(tmp, dpi=110, format="png")
        os.replace(tmp, path)
    finally:
        plt.close(fig)
        if os.path.exists(tmp):
            os.remove(tmp)


def channel_edges(centres):
    """Edges of channels with the given centres (half-way points, end spacing repeated)."""
    c = np.asarray(centres, float)
    if len(c) == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def utc_day_start(t0):
    """Seconds since 1970 of 00:00 UTC on the day of ``t0``, and that date as text."""
    day = _dt.datetime.fromtimestamp(float(t0), tz=_dt.timezone.utc).date()
    start = _dt.datetime(day.year, day.month, day.day, tzinfo=_dt.timezone.utc).timestamp()
    return start, day.isoformat()


def _mark_emitters(ax, emitters, fmin, fmax, strip=None):
    """Known emitters as labelled bars in lanes on ``strip`` (an axis above ``ax``);
    protected bands also lightly hatched on ``ax`` itself."""
    from rfisieve.review.emitters import in_band

    shown, seen = [], set()
    for e in in_band(emitters, fmin, fmax):
        if e["name"].lower() not in seen:
            seen.add(e["name"].lower())
            shown.append(e)
    lanes = []  # right end (MHz) of the last bar in each lane
    span = fmax - fmin
    for e in shown:
        a, b = max(e["start_mhz"], fmin), min(e["stop_mhz"], fmax)
        protected = e["kind"] == "protected"
        colour = PROTECTED_COLOUR if protected else EMITTER_COLOUR
        if protected:
            ax.axvspan(a, b, color=colour, alpha=0.10, lw=0, zorder=0, hatch="//")
        if strip is None:
            continue
        label_end = a + 0.0075 * span * (len(e["name"]) + 2)
        end = max(b, label_end)
        lane = next((i for i, r in enumerate(lanes) if r < a), None)
        if lane is None:
            lanes.append(end)
            lane = len(lanes) - 1
        else:
            lanes[lane] = end
        strip.barh(lane, b - a, left=a, height=0.7, color=colour, alpha=0.85 if protected else 0.6, lw=0)
        strip.text(a, lane, " " + e["name"], va="center", ha="left", fontsize=7.5,
                   color=INK, clip_on=True)
    if strip is not None:
        strip.set_ylim(max(len(lanes), 1) - 0.4, -0.6)
        strip.set_yticks([])
        strip.grid(False)
        for side in ("left", "bottom"):
            strip.spines[side].set_visible(False)
        strip.tick_params(axis="x", bottom=False, labelbottom=False)
        strip.set_xlim(fmin, fmax)
    return shown


def band_occupancy(path, band, agg, emitters=(), title=None):
    """Occupancy vs frequency of one band, stacked by primary cause, emitter ranges marked.

    ``agg`` is an :func:`rfisieve.review.occupancy.aggregate_band` result.
    """
    with plt.rc_context(STYLE):
        fig, (strip, ax) = plt.subplots(2, 1, figsize=(12.5, 5.4), sharex=True,
                                        gridspec_kw={"height_ratios": [1, 3.4], "hspace": 0.04})
        f = np.asarray(agg["freq"]) / 1e6
        s = np.asarray(agg["samples"])
        prim = fraction(np.asarray(agg["primary"]), s[None, :]) * 100
        prim = np.nan_to_num(prim)
        edges = channel_edges(f)
        base = np.zeros(len(f))
        for k, name in enumerate(BIT_NAMES):
            if not np.any(prim[k]):
                continue
            top = base + prim[k]
            ax.stairs(top, edges, baseline=base, fill=True, color=CAUSE_COLOURS[name],
                      label=name, zorder=2)
            base = top
        total = np.nan_to_num(fraction(agg["flagged"], s) * 100)
        ax.stairs(total, edges, color=INK, lw=0.7, zorder=3)
        ax.set_xlim(edges[0], edges[-1])
        ax.set_ylim(0, 105)
        _mark_emitters(ax, emitters, edges[0], edges[-1], strip=strip)
        ax.set_xlabel("Frequency (MHz)")
        ax.set_ylabel("Flagged (% of samples)")
        strip.set_title(title or f"Band {band}: occupancy by frequency, stacked by first cause; "
                        "known emitters (blue) and protected bands (green) above")
        ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=9, title="first cause")
        fig.subplots_adjust(left=0.07, right=0.86, top=0.92, bottom=0.1)
        _save(fig, path)


def scan_image(path, counts, title=None):
    """Time x frequency occupancy image of one scan, with the per-channel and per-dump margins."""
    a = counts["attrs"]
    ts, cs = np.asarray(counts["image/time_start"]), np.asarray(counts["image/chan_start"])
    img = fraction(counts["image/flagged"], counts["image/samples"]) * 100
    time = np.asarray(counts["time"], float)
    freq = np.asarray(counts["freq"], float) / 1e6
    day0, date = utc_day_start(time[0] if len(time) else 0.0)
    hours = (time - day0) / 3600.0
    th = channel_edges(hours)[ts]
    fe = channel_edges(freq)[cs]
    with plt.rc_context(STYLE):
        fig = plt.figure(figsize=(12.5, 6.2))
        gs = fig.add_gridspec(2, 3, width_ratios=[5, 1.1, 0.18], height_ratios=[1.1, 4],
                              hspace=0.06, wspace=0.05)
        ax = fig.add_subplot(gs[1, 0])
        top = fig.add_subplot(gs[0, 0], sharex=ax)
        side = fig.add_subplot(gs[1, 1], sharey=ax)
        cax = fig.add_subplot(gs[1, 2])
        mesh = ax.pcolormesh(fe, th, img, cmap=EMBER, vmin=0, vmax=100, shading="flat",
                             rasterized=True)
        ax.grid(False)
        ax.set_xlabel("Frequency (MHz)")
        ax.set_ylabel(f"Time (UTC hours, from 00:00 on {date})")
        if th[-1] > th[0]:
            ax.set_ylim(th[-1], th[0])   # time runs down the page
        chan = np.nan_to_num(fraction(counts["channel/flagged"], counts["channel/samples"]) * 100)
        top.stairs(chan, channel_edges(freq), fill=True, color=CAUSE_COLOURS["sumthreshold"], alpha=0.85)
        top.set_ylim(0, 100)
        top.set_ylabel("per channel\n(%)")
        plt.setp(top.get_xticklabels(), visible=False)
        dump = np.nan_to_num(fraction(counts["dump/flagged"], counts["dump/samples"]) * 100)
        side.fill_betweenx(hours, 0, dump, color=CAUSE_COLOURS["sk"], alpha=0.85, lw=0, step="mid")
        side.set_xlim(0, 100)
        side.set_xlabel("per dump (%)")
        plt.setp(side.get_yticklabels(), visible=False)
        cb = fig.colorbar(mesh, cax=cax)
        cb.set_label("Flagged (% of samples in bin)")
        top.set_title(title or f"Scan {a['scan']} (band {a['band']}): flagged samples over time and frequency")
        _save(fig, path)


def expected_sk_pdf(x, m, n, d):
    """Expected SK density at ``x`` for Gaussian noise, and a note of how it was made.

    Uses :func:`rfisieve.detect.kurtosis.sk_moments` (exact mean, variance, skewness) with a
    Pearson type III curve (Nita & Gary 2010, PASP 122, 595) when the module is
    present; otherwise a gamma law matched to the mean 1 and the variance of the
    generalized estimator, computed from the gamma/Dirichlet moments of DESIGN.md 3.
    """
    from scipy import stats

    try:
        from rfisieve.detect.kurtosis import sk_moments

        mean, var, skew, _ = sk_moments(int(m), int(n), float(d))
        dist = stats.pearson3(skew, loc=mean, scale=np.sqrt(var))
        note = "Pearson III from exact moments (rfisieve.detect.kurtosis.sk_moments)"
    except Exception:  # module absent or failing: degrade to a two-moment gamma law
        k = float(n) * float(d)
        M = float(m)
        mk = M * k
        es1_4 = mk * (mk + 1) * (mk + 2) * (mk + 3)
        es2_2 = M * k * (k + 1) * (k + 2) * (k + 3) + M * (M - 1) * (k * (k + 1)) ** 2
        ex = (k + 1) / (mk + 1)
        ex2 = es2_2 / es1_4
        c = (mk + 1) / (M - 1) * M
        var = c * c * (ex2 - ex * ex)
        mean = 1.0
        dist = stats.gamma(1.0 / var, scale=var)
        note = "gamma law matched to the exact mean and variance (rfisieve.detect.kurtosis absent)"
    return dist.pdf(x), dist, mean, var, note


def _hist_quantiles(edges, counts, qs):
    cum = np.concatenate([[0], np.cumsum(counts)]).astype(float)
    if cum[-1] <= 0:
        return [np.nan for _ in qs]
    cum /= cum[-1]
    return [float(np.interp(q, cum, edges)) for q in qs]


def sk_summary(sk):
    """Measured vs expected SK spread: dict with ``ratio`` = measured IQR / expected IQR, etc."""
    at = sk.get("attrs", {})
    counts = np.asarray(sk["counts"]).reshape(-1, len(sk["edges"]) - 1).sum(axis=0)
    edges = np.asarray(sk["edges"], float)
    out = {"total": int(counts.sum()), "m": at.get("m"), "n": at.get("n"), "d": at.get("d"),
           "lower": at.get("lower"), "upper": at.get("upper"), "mode": at.get("mode"),
           "method": at.get("method"), "pfa": at.get("pfa"), "ratio": None, "note": ""}
    if out["total"] == 0 or out["m"] is None:
        return out, counts, edges, None
    _, dist, mean, var, note = expected_sk_pdf(np.array([1.0]), out["m"], out["n"] or 1, out["d"] or 1.0)
    lo, hi = out["lower"], out["upper"]
    # Compare the spread of the values between the thresholds only: interference puts
    # SK outside them (and into the clipped end bins), which would widen the measured
    # quartiles although M, N and d are right.  The expected quartiles are those of the
    # same distribution truncated to [lower, upper].
    inside = counts.copy()
    f_lo, f_hi = 0.0, 1.0
    if lo is not None and hi is not None:
        centres = 0.5 * (edges[1:] + edges[:-1])
        inside[(centres < lo) | (centres > hi)] = 0
        f_lo, f_hi = float(dist.cdf(lo)), float(dist.cdf(hi))
    if inside.sum() == 0:
        return out, counts, edges, dist
    q1, q2, q3 = _hist_quantiles(edges, inside, (0.25, 0.5, 0.75))
    e1, e3 = (float(dist.ppf(f_lo + q * (f_hi - f_lo))) for q in (0.25, 0.75))
    out.update(median=q2, iqr=q3 - q1, expected_iqr=float(e3 - e1), ratio=(q3 - q1) / float(e3 - e1),
               expected_std=float(np.sqrt(var)), note=note)
    if lo is not None and hi is not None:
        centres = 0.5 * (edges[1:] + edges[:-1])
        out["outside"] = float(counts[(centres < lo) | (centres > hi)].sum() / counts.sum())
    return out, counts, edges, dist


def sk_diagnostic(path, sk, title=None):
    """Measured SK histogram (auto products summed) over the expected density, thresholds marked."""
    summ, counts, edges, dist = sk_summary(sk)
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(8.6, 4.3))
        width = np.diff(edges)
        total = counts.sum()
        dens = counts / (total * width) if total else np.zeros_like(width)
        ax.stairs(np.where(dens > 0, dens, np.nan), edges, fill=True, color=CAUSE_COLOURS["sk"],
                  alpha=0.35, label="measured (all auto products)")
        ax.stairs(np.where(dens > 0, dens, np.nan), edges, color=CAUSE_COLOURS["sk"], lw=1.1)
        if dist is not None:
            x = np.linspace(edges[0], edges[-1], 1200)
            with np.errstate(all="ignore"):
                y = dist.pdf(x)
            ax.plot(x, np.where(y > 0, y, np.nan), color=INK, lw=1.6, ls="-",
                    label=f"expected, M={summ['m']} N={summ['n']} d={summ['d']}")
        for key, txt in (("lower", "lower threshold"), ("upper", "upper threshold")):
            if summ.get(key) is not None:
                ax.axvline(float(summ[key]), color=CAUSE_COLOURS["sumthreshold"], ls="--", lw=1.3)
                ax.text(float(summ[key]), 0.97, f" {txt}\n {float(summ[key]):.4f}", fontsize=8,
                        color=CAUSE_COLOURS["sumthreshold"], va="top",
                        ha="left" if key == "upper" else "right",
                        transform=ax.get_xaxis_transform())
        ax.set_yscale("log")
        if total:
            pos = dens[dens > 0]
            ax.set_ylim(max(pos.min() * 0.5, 1e-6 * pos.max()), pos.max() * 3)
            nz = np.flatnonzero(counts)
            lo_x, hi_x = edges[nz[0]], edges[nz[-1] + 1]
            if summ.get("lower") is not None:
                lo_x = min(lo_x, float(summ["lower"]))
                hi_x = max(hi_x, float(summ["upper"]))
            pad = 0.08 * (hi_x - lo_x)
            ax.set_xlim(max(edges[0], lo_x - pad), min(edges[-1], hi_x + pad))
        else:
            ax.text(0.5, 0.5, "no SK values recorded", transform=ax.transAxes, ha="center")
        ax.set_xlabel("Spectral kurtosis estimate SK (dimensionless; 1 for Gaussian noise)")
        ax.set_ylabel("Probability density")
        if summ.get("ratio") is not None:
            verdict = "matches" if 0.85 <= summ["ratio"] <= 1.15 else "DOES NOT MATCH: check M, N, d"
            ax.text(0.99, 0.62, f"measured / expected width (IQR within thresholds): {summ['ratio']:.2f}\n{verdict}",
                    transform=ax.transAxes, ha="right", va="top", fontsize=9,
                    color=INK if "matches" == verdict else CAUSE_COLOURS["sumthreshold"],
                    bbox=dict(boxstyle="round", fc=PAPER, ec=GRID))
        ax.legend(loc="lower center", fontsize=8.5)
        ax.set_title(title or "Spectral kurtosis: measured vs expected")
        fig.tight_layout()
        _save(fig, path)


def change_plot(path, band, freq_hz, now, before, title=None):
    """Change of flagged fraction per channel since a previous run (percentage points)."""
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(12.5, 3.4))
        f = np.asarray(freq_hz) / 1e6
        delta = (np.asarray(now, float) - np.asarray(before, float)) * 100
        edges = channel_edges(f)
        up = np.where(delta > 0, delta, 0)
        down = np.where(delta < 0, delta, 0)
        ax.stairs(np.nan_to_num(up), edges, fill=True, color=CAUSE_COLOURS["sumthreshold"], label="more flagged now")
        ax.stairs(np.nan_to_num(down), edges, fill=True, color=CAUSE_COLOURS["sk"], label="less flagged now")
        ax.axhline(0, color=INK, lw=0.8)
        ax.set_xlim(edges[0], edges[-1])
        lim = max(5.0, float(np.nanmax(np.abs(delta))) * 1.1) if np.any(np.isfinite(delta)) else 5.0
        ax.set_ylim(-min(lim, 100), min(lim, 100))
        ax.set_xlabel("Frequency (MHz)")
        ax.set_ylabel("Change (percentage points)")
        ax.set_title(title or f"Band {band}: change in flagged fraction since the previous run")
        ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=9)
        fig.tight_layout()
        _save(fig, path)

"""Figures of the morning review page (matplotlib, Agg backend), written as PNG files.

Each function takes counts (dicts from :mod:`rfisieve.review.occupancy`) and writes one PNG;
the page embeds them and Snakemake's report registers the same files.  The palette is
the project's own ("moorland"): warm paper background, ink text, one colour per cause,
used for that cause only; totals (any cause) are drawn in one neutral grey.
"""

import datetime as _dt

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402
from matplotlib.transforms import Bbox  # noqa: E402

from rfisieve.review.occupancy import BIT_NAMES, fraction  # noqa: E402

from rfisieve.review.palette import (CAUSE_COLOURS, EMITTER_COLOUR, GRID, INK, PAPER,  # noqa: E402,F401
                                     PROTECTED_COLOUR)

STYLE = {
    "figure.facecolor": PAPER, "axes.facecolor": PAPER, "savefig.facecolor": PAPER,
    "axes.edgecolor": INK, "axes.labelcolor": INK, "xtick.color": INK, "ytick.color": INK,
    "text.color": INK, "axes.grid": True, "grid.color": GRID, "grid.linewidth": 0.6,
    "axes.spines.top": False, "axes.spines.right": False, "font.size": 10.5,
    "axes.titlesize": 12, "axes.titleweight": "bold", "axes.titlelocation": "left",
    "legend.frameon": False,
}


def _save(fig, path, close=True):
    """Save ``fig`` to ``path`` (PNG) via temp name + rename; then close it (unless
    ``close`` is false: a figure kept to be drawn again)."""
    import os

    tmp = os.path.join(os.path.dirname(os.path.abspath(path)), f".{os.path.basename(path)}.tmp.png")
    try:
        # zlib level 2, not Pillow's 6: a scan figure encodes in 0.05 s instead of 0.10 s
        # and comes out smaller (490 against 550 KiB; measured on the demo's figures)
        fig.savefig(tmp, dpi=110, format="png", pil_kwargs={"compress_level": 2})
        os.replace(tmp, path)
    finally:
        if close:
            plt.close(fig)
        if os.path.exists(tmp):
            os.remove(tmp)


_SUPERSCRIPT = str.maketrans("-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")


def decade_label(v, _pos=None):
    """A log axis's label of ``v``: 1, 10 and 100 as plain numbers, other decades as
    10 with a Unicode superscript exponent (10\u207b\u2076), anything else (a value
    between decades) unlabelled.  Matplotlib's own log labels are mathtext, whose parser
    is built at its first use in a process: 0.1 s of the SK figure's 0.4 s."""
    if not v > 0:
        return ""
    e = round(np.log10(v))
    if abs(v / 10.0 ** e - 1.0) > 1e-9:
        return ""
    if 0 <= e <= 2:
        return f"{10 ** int(e)}"
    return "10" + str(int(e)).translate(_SUPERSCRIPT)


def log_axis(axis):
    """Decades labelled by :func:`decade_label` on a log-scaled ``axis`` (ax.xaxis or
    ax.yaxis), minor ticks unlabelled."""
    from matplotlib.ticker import FuncFormatter, NullFormatter

    axis.set_major_formatter(FuncFormatter(decade_label))
    axis.set_minor_formatter(NullFormatter())


def stairs(ax, values, edges, **kwargs):
    """``ax.stairs(values, edges, **kwargs)``, with the data limits taken from the step
    outline's vertices in one call.  Matplotlib takes a patch's limits segment by
    segment in Python (Bezier extrema of each straight segment): 0.42 s of the 1.3 s a
    one-scan page spends drawing, for outlines of a few thousand vertices.  A step
    outline holds only moves and straight lines in data coordinates, so its vertices
    give the same limits (and the same lowest positive value, for log axes)."""
    quick = getattr(ax, "_update_patch_limits", None) is not None
    if quick:
        ax._update_patch_limits = lambda patch: ax.update_datalim(patch.get_path().vertices)
    try:
        return ax.stairs(values, edges, **kwargs)
    finally:
        if quick:
            del ax._update_patch_limits


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


#: Tick steps of a UTC time axis, seconds (each divides a day, so ticks fall on round clock times).
TIME_STEPS = (1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 900, 1200, 1800, 3600, 7200, 10800, 21600, 43200, 86400)


def utc_ticks(t0, t1, max_ticks=7):
    """Round UTC clock times within ``[t0, t1]`` (s since 1970): (ticks in s, labels).

    Labels are ``HH:MM`` (``HH:MM:SS`` when the span is under a few minutes); a day
    boundary inside the span is just another tick (``00:00``), so times run on across
    midnight.  The step is the smallest of :data:`TIME_STEPS` giving at most
    ``max_ticks`` ticks.
    """
    t0, t1 = float(min(t0, t1)), float(max(t0, t1))
    span = max(t1 - t0, 1e-9)
    step = next((s for s in TIME_STEPS if span / s <= max_ticks - 1), TIME_STEPS[-1])
    first = np.ceil(t0 / step) * step
    ticks = np.arange(first, t1 + 1e-6, step)
    fmt = "%H:%M" if step >= 60 else "%H:%M:%S"
    labels = [_dt.datetime.fromtimestamp(float(t), tz=_dt.timezone.utc).strftime(fmt) for t in ticks]
    return ticks, labels


def utc_span(t0, t1):
    """``2026-12-01 23:05 to 2026-12-02 00:40 UTC`` (the date given again only when it changes)."""
    a = _dt.datetime.fromtimestamp(float(t0), tz=_dt.timezone.utc)
    b = _dt.datetime.fromtimestamp(float(t1), tz=_dt.timezone.utc)
    end = b.strftime("%H:%M") if a.date() == b.date() else b.strftime("%Y-%m-%d %H:%M")
    return f"{a.strftime('%Y-%m-%d %H:%M')} to {end} UTC"


def set_time_axis(ax, which, t0, t1, max_ticks=7, label=True):
    """Put UTC ``HH:MM`` ticks on the x or y axis of ``ax`` (data in s since 1970)."""
    ticks, labels = utc_ticks(t0, t1, max_ticks)
    axis = ax.xaxis if which == "x" else ax.yaxis
    axis.set_ticks(ticks)
    axis.set_ticklabels(labels)
    if label:
        text = f"Time, UTC (HH:MM): {utc_span(t0, t1)}"
        (ax.set_xlabel if which == "x" else ax.set_ylabel)(text)


def _text_width(fig, ax, text, fontsize):
    """Width of ``text`` in data units of ``ax``'s x axis (measured by the Agg renderer)."""
    t = ax.text(0, 0, text, fontsize=fontsize)
    bb = t.get_window_extent(renderer=fig.canvas.get_renderer())
    t.remove()
    x0 = ax.transData.inverted().transform((0, 0))[0]
    x1 = ax.transData.inverted().transform((bb.width, 0))[0]
    return abs(x1 - x0)


def _strip_lanes(fig, strip, shown, fmin, fmax, fontsize):
    """Lane of each emitter bar so that no two labels (or bars) overlap."""
    strip.set_xlim(fmin, fmax)
    lanes, out = [], []
    for e in shown:
        a, b = max(e["start_mhz"], fmin), min(e["stop_mhz"], fmax)
        # the label's padding measured as letters: the renderer's extent of a text drops
        # its trailing space, and two labels met without a gap ("...410 MHzTV ...")
        width = _text_width(fig, strip, "nn" + e["name"] + "nn", fontsize)
        # a label that would run past the right edge is drawn leftwards from the bar's end
        right = a + width <= fmax
        lo, hi = (a, max(b, a + width)) if right else (min(a, b - width), b)
        lane = next((i for i, r in enumerate(lanes) if r < lo), None)
        if lane is None:
            lanes.append(hi)
            lane = len(lanes) - 1
        else:
            lanes[lane] = hi
        out.append((e, a, b, lane, right))
    return out, len(lanes)


def _emitters_shown(emitters, fmin, fmax):
    from rfisieve.review.emitters import in_band, merge_duplicates

    return merge_duplicates(in_band(emitters, fmin, fmax))


def _draw_strip(strip, placed, nlanes, fmin, fmax, fontsize):
    for e, a, b, lane, right in placed:
        protected = e["kind"] == "protected"
        colour = PROTECTED_COLOUR if protected else EMITTER_COLOUR
        strip.barh(lane, max(b - a, 1e-9), left=a, height=0.72, color=colour, alpha=0.8 if protected else 0.55, lw=0)
        strip.text(a if right else b, lane, " " + e["name"] + " ", va="center", ha="left" if right else "right",
                   fontsize=fontsize, color=INK, clip_on=True)
    strip.set_ylim(max(nlanes, 1) - 0.4, -0.6)
    strip.set_yticks([])
    strip.grid(False)
    for side in ("left", "bottom"):
        strip.spines[side].set_visible(False)
    strip.tick_params(axis="x", bottom=False, labelbottom=False)
    strip.set_xlim(fmin, fmax)


STRIP_FONT = 9.5


def band_occupancy(path, band, agg, emitters=(), title=None):
    """Occupancy vs frequency of one band, stacked by primary cause, emitter ranges marked.

    ``agg`` is an :func:`rfisieve.review.occupancy.aggregate_band` result.  The strip
    above the plot labels each known emitter once (duplicates merged), legibly at the
    page's width, in as many lanes as the labels need.
    """
    f = np.asarray(agg["freq"]) / 1e6
    edges = channel_edges(f)
    shown = _emitters_shown(emitters, edges[0], edges[-1])
    with plt.rc_context(STYLE):
        # first pass: lay the labels out on a strip of the final width
        probe = plt.figure(figsize=(12.5, 2))
        pax = probe.add_axes([0.07, 0.1, 0.79, 0.8])
        placed, nlanes = _strip_lanes(probe, pax, shown, edges[0], edges[-1], STRIP_FONT)
        plt.close(probe)
        strip_h = 0.25 * max(nlanes, 1) + 0.2
        fig, (strip, ax) = plt.subplots(2, 1, figsize=(12.5, 4.6 + strip_h), sharex=True,
                                        gridspec_kw={"height_ratios": [strip_h, 4.0], "hspace": 0.03})
        s = np.asarray(agg["samples"])
        prim = np.nan_to_num(fraction(np.asarray(agg["primary"]), s[None, :]) * 100)
        base = np.zeros(len(f))
        for k, name in enumerate(BIT_NAMES):
            if not np.any(prim[k]):
                continue
            top = base + prim[k]
            stairs(ax, top, edges, baseline=base, fill=True, color=CAUSE_COLOURS[name], label=name, zorder=2)
            base = top
        total = np.nan_to_num(fraction(agg["flagged"], s) * 100)
        stairs(ax, total, edges, color=INK, lw=0.7, zorder=3, label="any cause")
        for e in shown:
            if e["kind"] == "protected":
                ax.axvspan(max(e["start_mhz"], edges[0]), min(e["stop_mhz"], edges[-1]), color=PROTECTED_COLOUR,
                           alpha=0.10, lw=0, zorder=0, hatch="//")
        ax.set_xlim(edges[0], edges[-1])
        ax.set_ylim(0, 105)
        _draw_strip(strip, placed, nlanes, edges[0], edges[-1], STRIP_FONT)
        ax.set_xlabel("Frequency (MHz)")
        ax.set_ylabel("Flagged (% of samples)")
        strip.set_title(title or f"Band {band}: occupancy by frequency, stacked by first cause")
        ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=9, title="first cause")
        fig.subplots_adjust(left=0.07, right=0.86, top=1 - 0.45 / (4.6 + strip_h), bottom=0.1)
        _save(fig, path)
    return shown


#: Total occupancy (any cause) image: paper -> ink, neutral (no cause's colour).
TOTAL_MAP = LinearSegmentedColormap.from_list("rfisieve_total", [PAPER, "#c9c3b6", "#8c8577", "#4a4452", INK])
#: Data image (power relative to the bandpass): a grey ramp, dark = weak, light = strong.
DATA_MAP = "gray"
TOTAL_COLOUR = "#6c6577"   # totals everywhere (margins, bars): one neutral colour


def _image_time_edges(time, ts):
    return channel_edges(np.asarray(time, float))[np.asarray(ts)]


def scan_image(path, counts, title=None, data=None, data_note=""):
    """The data and the mask of one scan, on the same time x frequency axes.

    Top: the flagged fraction per channel (any cause).  Then, when ``data`` is given
    (:func:`rfisieve.review.provenance.data_preview`, on the occupancy image's bins),
    the downsampled dynamic spectrum relative to the bandpass (dB); below it the
    flagged fraction of each bin, with the flagged fraction per dump beside it.
    Time runs down the page in UTC clock time.

    A night draws hundreds of these, all with the same layout, so the figure, its axes
    and colour bars are built once per process and layout (:func:`_scan_layout`) and
    only the scan's own artists, limits and texts are drawn anew for each scan.
    """
    a = counts["attrs"]
    ts, cs = np.asarray(counts["image/time_start"]), np.asarray(counts["image/chan_start"])
    img = fraction(counts["image/flagged"], counts["image/samples"]) * 100
    time = np.asarray(counts["time"], float)
    freq = np.asarray(counts["freq"], float) / 1e6
    th = _image_time_edges(time, ts)
    fe = channel_edges(freq)[cs]
    lay = _scan_layout(data is not None)
    fig, top, ax, side = lay["fig"], lay["top"], lay["mask"], lay["side"]
    with plt.rc_context(STYLE):
        for artist in lay.pop("drawn", ()):
            artist.remove()
        for axk in lay["shared"]:  # autoscale afresh, as on a new figure
            axk.dataLim.set_points(Bbox.null().get_points())
            axk.ignore_existing_data_limits = True
            axk.set_autoscale_on(True)
        drawn = [ax.pcolorfast(fe, th, img, cmap=TOTAL_MAP, vmin=0, vmax=100)]
        if data is not None:
            dax = lay["data"]
            finite = np.asarray(data)[np.isfinite(data)]
            lo, hi = (np.percentile(finite, [1, 99]) if finite.size else (-1.0, 1.0))
            dm = dax.pcolorfast(fe, th, np.ma.masked_invalid(data), cmap=DATA_MAP, vmin=lo, vmax=max(hi, lo + 1e-3))
            dcb = lay["data_bar"]
            dcb.mappable, dm.colorbar = dm, dcb
            dcb.update_normal(dm)
            drawn.append(dm)
            dax.set_title("Data: power relative to each channel's median over time" +
                          (f" ({data_note})" if data_note else ""), fontsize=10, fontweight="normal", y=1.0)
        for kind in lay["rows"]:
            axk = lay[kind]
            if th[-1] > th[0]:
                axk.set_ylim(th[-1], th[0])   # time runs down the page
            set_time_axis(axk, "y", th[0], th[-1], max_ticks=6, label=False)
        ax.set_xlabel(f"Frequency (MHz) · time: {utc_span(time[0], time[-1])}" if len(time) else "Frequency (MHz)")
        chan = np.nan_to_num(fraction(counts["channel/flagged"], counts["channel/samples"]) * 100)
        drawn.append(stairs(top, chan, channel_edges(freq), fill=True, color=TOTAL_COLOUR))
        top.set_ylim(0, 100)
        dump = np.nan_to_num(fraction(counts["dump/flagged"], counts["dump/samples"]) * 100)
        drawn.append(side.fill_betweenx(time, 0, dump, color=TOTAL_COLOUR, lw=0, step="mid"))
        side.set_xlim(0, 100)
        top.set_title(title or f"Scan {a['scan']} (band {a['band']})", y=1.0)
        lay["drawn"] = drawn
        _save(fig, path, close=False)


#: Per process: the scan figure's layout with and without the data row (:func:`_scan_layout`).
_SCAN_LAYOUTS = {}


def _scan_layout(with_data):
    """The figure of :func:`scan_image` without any scan's artists: its axes, their fixed
    labels and ticks, the colour bars; built on first use in this process, then reused."""
    if with_data in _SCAN_LAYOUTS:
        return _SCAN_LAYOUTS[with_data]
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize
    from matplotlib.figure import Figure

    rows = [("mask", 4.0)] if not with_data else [("data", 4.0), ("mask", 4.0)]
    with plt.rc_context(STYLE):
        fig = Figure(figsize=(12.5, 1.6 + sum(r[1] for r in rows) * 0.95 + 0.8))
        gs = fig.add_gridspec(1 + len(rows), 3, width_ratios=[5, 1.0, 0.16],
                              height_ratios=[1.0] + [r[1] for r in rows], hspace=0.12, wspace=0.12)
        top = fig.add_subplot(gs[0, 0])
        lay = {"fig": fig, "top": top, "rows": [r[0] for r in rows]}
        for i, (kind, _) in enumerate(rows):
            lay[kind] = fig.add_subplot(gs[1 + i, 0], sharex=top, sharey=lay.get("data"))
        ax = lay["mask"]
        cb = fig.colorbar(ScalarMappable(Normalize(0, 100), TOTAL_MAP), cax=fig.add_subplot(gs[len(rows), 2]))
        cb.set_label("Flagged (% of bin)")
        if with_data:
            dax = lay["data"]
            lay["data_bar"] = fig.colorbar(ScalarMappable(Normalize(-1, 1), DATA_MAP), cax=fig.add_subplot(gs[1, 2]))
            lay["data_bar"].set_label("Power / bandpass (dB)")
            plt.setp(dax.get_xticklabels(), visible=False)
            dax.set_ylabel("Time, UTC (HH:MM)")
        # Titles at y = 1.0 given, not placed by matplotlib: these axes have no tick
        # labels or offset text above them (percent 0-100 on fixed ticks, clock times),
        # so the placement always returned 1.0, after laying out every y tick label
        # again (a tenth of a small scan's figure; the same pixels)
        ax.set_title("Mask: flagged samples (any cause, all products)", fontsize=10, fontweight="normal", y=1.0)
        for kind in lay["rows"]:
            lay[kind].grid(False)
        ax.set_ylabel("Time, UTC (HH:MM)")
        top.set_yticks([0, 50, 100])
        top.set_ylabel("per channel\n(% flagged)")
        plt.setp(top.get_xticklabels(), visible=False)
        side = lay["side"] = fig.add_subplot(gs[len(rows), 1], sharey=ax)
        side.set_xticks([0, 50, 100])
        side.set_xlabel("per dump (% flagged)")
        plt.setp(side.get_yticklabels(), visible=False)
        lay["shared"] = [top, *(lay[k] for k in lay["rows"]), side]
        fig.subplots_adjust(left=0.08, right=0.93, top=0.95, bottom=0.07)
    _SCAN_LAYOUTS[with_data] = lay
    return lay


def night_fraction(path, series, title=None):
    """Flagged fraction over the night, one panel per band, scan boundaries marked.

    ``series`` maps band -> list of dicts ``name``, ``time`` (s since 1970), ``frac``
    (flagged fraction per point, 0..1), ``start``, ``stop`` (s), one per scan.
    """
    bands = list(series)
    allt = [t for lst in series.values() for s in lst for t in (s["start"], s["stop"])]
    t0, t1 = min(allt), max(allt)
    with plt.rc_context(STYLE):
        fig, axs = plt.subplots(len(bands), 1, figsize=(12.5, 1.2 + 1.7 * len(bands)), sharex=True, squeeze=False)
        for ax, band in zip(axs[:, 0], bands):
            for i, s in enumerate(sorted(series[band], key=lambda s: s["start"])):
                ax.axvspan(s["start"], s["stop"], color="#efe9dc" if i % 2 == 0 else "#e4ddcc", lw=0, zorder=0)
                for edge in (s["start"], s["stop"]):
                    ax.axvline(edge, color=GRID, lw=0.8, zorder=1)
                ax.plot(s["time"], 100 * np.asarray(s["frac"]), color=INK, lw=0.9, zorder=3)
                if (s["stop"] - s["start"]) > 0.12 * (t1 - t0):
                    ax.text(s["start"], 0.97, " " + s["name"], transform=ax.get_xaxis_transform(), fontsize=8,
                            va="top", ha="left", color=INK, clip_on=True, zorder=4,
                            bbox=dict(boxstyle="square,pad=0.1", fc=PAPER, ec="none", alpha=0.85))
            day, _ = utc_day_start(t0)
            for mid in np.arange(day + 86400, t1, 86400):
                ax.axvline(mid, color=INK, lw=0.8, ls=":")
                ax.text(mid, 0.02, " " + _dt.datetime.fromtimestamp(mid, tz=_dt.timezone.utc).strftime("%Y-%m-%d"),
                        transform=ax.get_xaxis_transform(), fontsize=8, va="bottom")
            ax.set_ylim(0, 100)
            ax.set_yticks([0, 50, 100])
            ax.set_ylabel(f"band {band}\n% flagged")
            ax.grid(axis="x", visible=False)
        pad = 0.01 * (t1 - t0)
        axs[-1, 0].set_xlim(t0 - pad, t1 + pad)
        set_time_axis(axs[-1, 0], "x", t0, t1, max_ticks=9)
        axs[0, 0].set_title(title or "Flagged fraction over the night (all products), scan boundaries shaded")
        fig.tight_layout()
        _save(fig, path)


class _Pearson3:
    """Pearson type III law of positive skewness ``skew`` (> 1.6e-5), location ``loc`` and
    scale ``scale``: ``pdf``, ``cdf`` and ``ppf`` computed as ``scipy.stats.pearson3``
    computes them (the same scipy.special calls in the same order, so the same numbers:
    tests/test_review.py compares them), without importing scipy.stats (half a second
    of the review's start-up).  The law: a gamma law of shape alpha = 4 / skew^2 in
    beta (x' - zeta), x' = (x - loc) / scale, beta = 2 / skew, zeta = -alpha / beta."""

    def __init__(self, skew, loc, scale):
        self.loc, self.scale = loc, scale
        self.beta = 2.0 / (skew * 1.0)
        self.alpha = (1.0 * self.beta) ** 2
        self.zeta = 0.0 - self.alpha / self.beta

    def _t(self, x):
        return self.beta * (np.asarray((np.asarray(x) - self.loc) / self.scale, dtype=float) - self.zeta)

    def pdf(self, x):
        from scipy import special as sc

        t = np.atleast_1d(self._t(x))
        logp = np.full(t.shape, -np.inf)
        inside = (t > 0) & (t < np.inf)
        logp[inside] = sc.xlogy(self.alpha - 1.0, t[inside]) - t[inside] - sc.gammaln(self.alpha)
        logp[np.isnan(t)] = np.nan
        ans = np.exp(np.log(abs(self.beta)) + logp)
        ans[np.isnan(ans)] = 0.0
        ans = ans / self.scale
        return ans.reshape(np.shape(x)) if np.ndim(x) else ans[0]

    def cdf(self, x):
        from scipy import special as sc

        t = np.atleast_1d(self._t(x))
        ans = np.where(t >= np.inf, 1.0, 0.0)
        inside = (t > 0) & (t < np.inf)
        ans[inside] = sc.gammainc(self.alpha, t[inside])
        ans[np.isnan(t)] = np.nan
        return ans.reshape(np.shape(x)) if np.ndim(x) else ans[0]

    def ppf(self, q):
        from scipy import special as sc

        shape = np.shape(q)
        q = np.atleast_1d(np.asarray(q, dtype=float))
        ans = np.full(q.shape, np.nan)
        ans[q == 0] = -np.inf
        ans[q == 1] = np.inf
        inside = (q > 0) & (q < 1)
        ans[inside] = (sc.gammaincinv(self.alpha, q[inside]) / self.beta + self.zeta) * self.scale + self.loc
        return ans.reshape(shape) if shape else ans[0]


def pearson3(skew, loc, scale):
    """The Pearson type III law (:class:`_Pearson3`; ``scipy.stats.pearson3`` itself when
    the skewness is below scipy's switch to the normal law, or negative)."""
    if skew >= 0.000016:
        return _Pearson3(skew, loc, scale)
    from scipy import stats

    return stats.pearson3(skew, loc=loc, scale=scale)


def expected_sk_pdf(x, m, n, d):
    """Expected SK density at ``x`` for Gaussian noise, and a note of how it was made.

    Uses :func:`rfisieve.detect.kurtosis.sk_moments` (exact mean, variance, skewness) with a
    Pearson type III curve (Nita & Gary 2010, PASP 122, 595) when the module is
    present; otherwise a gamma law matched to the mean 1 and the variance of the
    generalized estimator, computed from the gamma/Dirichlet moments of docs/design.md 4.
    """
    try:
        # the moments' own module: rfisieve.detect.kurtosis re-exports the same function,
        # but importing it compiles the detector's kernels too (a quarter of a second)
        from rfisieve.detect.kurtosis_moments import sk_moments

        mean, var, skew, _ = sk_moments(int(m), int(n), float(d))
        dist = pearson3(skew, mean, np.sqrt(var))
        note = "Pearson III from exact moments (rfisieve.detect.kurtosis.sk_moments)"
    except Exception:  # module absent or failing: degrade to a two-moment gamma law
        from scipy import stats

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


#: Width ratio (measured / expected IQR within the thresholds) taken as a match.
RATIO_OK = (0.85, 1.15)


def sk_summary(sk):
    """Measured vs expected SK spread, and what the histogram cannot show.

    The engine clips SK into its histogram, so the last bin holds every value at or
    above its lower edge: those values are *beyond* the histogram's range.  Returns
    (summary dict, counts, edges, expected distribution or None); the dict holds
    ``ratio`` = measured IQR / expected IQR (within the thresholds), ``outside`` (the
    fraction of SK values outside the thresholds, None when the histogram ends below
    the upper threshold), ``beyond`` (values in the last, clipping bin), ``top`` (that
    bin's lower edge), ``cut_off`` (True when values lie beyond the range or a
    threshold lies outside it) and ``verdict`` ("ok" or "check") with ``reasons``.
    """
    at = sk.get("attrs", {})
    edges = np.asarray(sk["edges"], float)
    counts = np.asarray(sk["counts"]).reshape(-1, len(edges) - 1).sum(axis=0)
    out = {"total": int(counts.sum()), "m": at.get("m"), "n": at.get("n"), "d": at.get("d"),
           "lower": at.get("lower"), "upper": at.get("upper"), "mode": at.get("mode"),
           "method": at.get("method"), "pfa": at.get("pfa"), "ratio": None, "note": "",
           "beyond": int(counts[-1]) if len(counts) else 0, "top": float(edges[-2]) if len(edges) > 1 else None,
           "outside": None, "cut_off": False, "verdict": None, "reasons": []}
    lo, hi = out["lower"], out["upper"]
    if out["total"]:
        out["cut_off"] = out["beyond"] > 0 or (hi is not None and float(hi) >= out["top"])
        if out["beyond"]:
            out["reasons"].append(f"{out['beyond']:,} SK values at or above {out['top']:.3g}, "
                                  "beyond the histogram's range")
        if hi is not None and float(hi) >= out["top"]:
            out["reasons"].append(f"the upper threshold {float(hi):.3g} lies beyond the histogram "
                                  f"(ends at {out['top']:.3g})")
    if out["total"] == 0 or out["m"] is None:
        out["verdict"] = "check" if out["cut_off"] else None
        return out, counts, edges, None
    _, dist, mean, var, note = expected_sk_pdf(np.array([1.0]), out["m"], out["n"] or 1, out["d"] or 1.0)
    # Compare the spread of the values between the thresholds only: interference puts
    # SK outside them, which would widen the measured quartiles although M, N and d are
    # right.  The expected quartiles are those of the same law truncated to [lower, upper].
    # The clipping last bin is never "inside".
    centres = 0.5 * (edges[1:] + edges[:-1])
    inside = counts.copy()
    inside[-1] = 0
    f_lo, f_hi = 0.0, 1.0
    if lo is not None and hi is not None:
        outside = (centres < lo) | (centres > hi)
        inside[outside] = 0
        f_lo, f_hi = float(dist.cdf(lo)), float(dist.cdf(hi))
        if float(hi) < out["top"]:
            outside[-1] = True
            out["outside"] = float(counts[outside].sum() / counts.sum())
    if inside.sum() > 0:
        q1, q2, q3 = _hist_quantiles(edges, inside, (0.25, 0.5, 0.75))
        e1, e3 = (float(dist.ppf(f_lo + q * (f_hi - f_lo))) for q in (0.25, 0.75))
        out.update(median=q2, iqr=q3 - q1, expected_iqr=float(e3 - e1), ratio=(q3 - q1) / float(e3 - e1),
                   expected_std=float(np.sqrt(var)), note=note)
        if not RATIO_OK[0] <= out["ratio"] <= RATIO_OK[1]:
            out["reasons"].insert(0, f"width ratio {out['ratio']:.2f}: M, N or d may be wrong")
    out["verdict"] = "check" if out["reasons"] else "ok"
    return out, counts, edges, dist


def sk_ranges(summ, counts, edges):
    """x ranges of the two SK panels: (around the thresholds, whole drawn range).

    The first spans both thresholds with a quarter of their distance on each side (and
    the middle 98 % of the data); the second runs from 0 to the last occupied bin below
    the clipping bin, at least past the upper threshold, and never past the histogram.
    """
    lo, hi = summ.get("lower"), summ.get("upper")
    top = float(edges[-2])
    nz = np.flatnonzero(counts[:-1])
    data_hi = float(edges[nz[-1] + 1]) if len(nz) else top
    if lo is None or hi is None:
        q = _hist_quantiles(edges, counts, (0.01, 0.99))
        a, b = (q if np.all(np.isfinite(q)) else (0.0, 2.0))
        return (a, b), (float(edges[0]), max(data_hi, b))
    span = float(hi) - float(lo)
    core = (max(float(edges[0]), float(lo) - 0.25 * span), float(hi) + 0.25 * span)
    whole_hi = min(top, max(data_hi, float(hi) + 0.1 * span))
    return core, (float(edges[0]), max(whole_hi, core[1]) if top > float(hi) else top)


def sk_diagnostic(path, sk, title=None):
    """SK histogram of the auto products: around the thresholds over the expected
    density, and over its whole range with the values beyond it counted."""
    summ, counts, edges, dist = sk_summary(sk)
    sk_col = CAUSE_COLOURS["sk"]
    with plt.rc_context(STYLE):
        fig, (ax, wide) = plt.subplots(1, 2, figsize=(12.5, 4.3), gridspec_kw={"width_ratios": [1.15, 1]})
        width = np.diff(edges)
        total = counts.sum()
        if not total:
            for a_ in (ax, wide):
                a_.text(0.5, 0.5, "no SK values recorded", transform=a_.transAxes, ha="center")
            ax.set_title(title or "Spectral kurtosis")
            _save(fig, path)
            return summ
        core, whole = sk_ranges(summ, counts, edges)
        dens = counts / (total * width)
        lo, hi = summ.get("lower"), summ.get("upper")
        centres = 0.5 * (edges[1:] + edges[:-1])
        out = np.zeros(len(counts), bool) if lo is None else (centres < lo) | (centres > hi)
        main = slice(0, len(counts) - 1)   # the clipping bin is drawn apart
        yy = np.where(dens > 0, dens, np.nan)[main]
        stairs(ax, np.where(~out[main], yy, np.nan), edges[:-1], fill=True, color=TOTAL_COLOUR, alpha=0.45,
               label="measured, within thresholds")
        stairs(ax, np.where(out[main], yy, np.nan), edges[:-1], fill=True, color=sk_col, alpha=0.8,
               label="measured, outside (flagged by sk)")
        # whole range: counts summed into at most WIDE_BINS coarser bins, so thin tails show
        log_x = lo is not None and whole[1] > WIDE_LOG_FROM * float(hi)
        wide_edges, wide_in, wide_out = _coarse(edges[:-1], counts[main], out[main], whole[1], log=log_x)
        for part, colour, alpha in ((wide_in, TOTAL_COLOUR, 0.6), (wide_out, sk_col, 0.85)):
            stairs(wide, np.where(part > 0, part, np.nan), wide_edges, fill=True, color=colour, alpha=alpha)
        for a_ in (ax, wide):
            a_.set_yscale("log")
            log_axis(a_.yaxis)
        if dist is not None:
            x = np.linspace(core[0], core[1], 800)
            with np.errstate(all="ignore"):
                y = dist.pdf(x)
            ax.plot(x, np.where(y > 0, y, np.nan), color=INK, lw=1.5,
                    label=f"expected, M={summ['m']} N={summ['n']} d={summ['d']}")
        pos = dens[main][(dens[main] > 0) & (centres[main] >= core[0]) & (centres[main] <= core[1])]
        if pos.size:
            ax.set_ylim(max(pos.min() * 0.5, 1e-6 * pos.max()), pos.max() * 4)
        ax.set_xlim(*core)
        if log_x:
            wide.set_xscale("log")
            log_axis(wide.xaxis)
            wide.set_xlim(float(edges[edges > 0][0]), whole[1] * 1.3)
        else:
            wide.set_xlim(whole[0], whole[1] + 0.06 * (whole[1] - whole[0]))
        if summ["beyond"]:
            x_b, w = ((whole[1] * 1.12, whole[1] * 0.1) if log_x else
                      (whole[1] + 0.03 * (whole[1] - whole[0]), 0.04 * (whole[1] - whole[0])))
            wide.bar(x_b, summ["beyond"], width=w, color=sk_col, hatch="///",
                     edgecolor=INK, lw=0.6, label=f"≥ {summ['top']:.3g} (beyond the histogram)")
        for key, txt in (("lower", "lower"), ("upper", "upper")):
            if summ.get(key) is not None:
                v = float(summ[key])
                wide.axvline(v, color=INK, ls="--", lw=1.0)
                ax.axvline(v, color=INK, ls="--", lw=1.1)
                ax.text(v, 0.985, f" {txt} {v:.3f} ", fontsize=8, color=INK, va="top",
                        ha="left" if key == "upper" else "right", transform=ax.get_xaxis_transform(),
                        bbox=dict(boxstyle="square,pad=0.15", fc=PAPER, ec="none", alpha=0.9))
        ax.set_xlabel("SK (dimensionless; 1 for Gaussian noise)")
        ax.set_ylabel("Probability density")
        wide.set_xlabel("SK, whole range of the histogram")
        wide.set_ylabel("Count of SK values")
        verdict = ""
        if summ.get("ratio") is not None:
            verdict = f"width ratio {summ['ratio']:.2f}: " + ("ok" if summ["verdict"] == "ok" else "CHECK")
        elif summ["verdict"] == "check":
            verdict = "CHECK"
        # at y = 1.0 (see _scan_layout): log y axes, ticks below, so nothing above them
        ax.set_title("Around the thresholds" + (f" — {verdict}" if verdict else ""), fontsize=10.5, y=1.0)
        wide.set_title("Whole range: the tails (dashed: thresholds)", fontsize=10.5, y=1.0)
        if summ["reasons"]:
            fig.text(0.01, 0.01, "Check: " + "; ".join(summ["reasons"]), fontsize=8.5, color=INK, ha="left",
                     va="bottom", bbox=dict(boxstyle="round", fc=PAPER, ec=INK))
        ax.legend(loc="lower center", fontsize=8)
        if summ["beyond"]:
            wide.legend(loc="upper right", fontsize=8)
        fig.suptitle(title or "Spectral kurtosis: measured vs expected", x=0.01, ha="left", fontweight="bold",
                     fontsize=12)
        # fixed margins: tight_layout measured every tick label (0.4 s a figure)
        fig.subplots_adjust(left=0.07, right=0.985, top=0.86, bottom=0.2 if summ["reasons"] else 0.13,
                            wspace=0.2)
        _save(fig, path)
    return summ


#: Most bins drawn in the whole-range SK panel.
WIDE_BINS = 240


#: The whole-range SK panel's x axis is logarithmic when it reaches this many times past
#: the upper threshold (strong interference puts SK in the hundreds).
WIDE_LOG_FROM = 20.0


def _coarse(edges, counts, outside, upto, log=False):
    """Sum counts into at most about WIDE_BINS bins, evenly spaced up to ``upto`` on the
    panel's axis (logarithmic with ``log``, from the first positive edge); a bin already
    wider than that spacing is kept: (edges, inside counts, outside counts)."""
    e_all = np.asarray(edges, float)
    if log:
        lo = e_all[e_all > 0][0]
        u = np.log10(np.maximum(e_all[:-1], lo))
        target = np.linspace(np.log10(lo), np.log10(max(upto, lo * 10)), WIDE_BINS + 1)
    else:
        u = e_all[:-1]
        target = np.linspace(e_all[0], max(upto, e_all[1]), WIDE_BINS + 1)
    starts = np.unique(np.r_[0, np.searchsorted(u, target, side="left")])
    starts = starts[starts < len(counts)]
    e = np.append(e_all[starts], e_all[-1])
    return (e, np.add.reduceat(np.where(outside, 0, counts), starts).astype(float),
            np.add.reduceat(np.where(outside, counts, 0), starts).astype(float))


#: Change plot: more flagged now (dark) / less flagged now (light), neutral tones (no cause's colour).
MORE_COLOUR, LESS_COLOUR = "#4a4452", "#b7b0a2"


def change_plot(path, band, freq_hz, now, before, title=None):
    """Change of flagged fraction per channel since a previous run (percentage points)."""
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(12.5, 3.4))
        f = np.asarray(freq_hz) / 1e6
        delta = (np.asarray(now, float) - np.asarray(before, float)) * 100
        edges = channel_edges(f)
        up = np.where(delta > 0, delta, 0)
        down = np.where(delta < 0, delta, 0)
        stairs(ax, np.nan_to_num(up), edges, fill=True, color=MORE_COLOUR, label="more flagged now")
        stairs(ax, np.nan_to_num(down), edges, fill=True, color=LESS_COLOUR, label="less flagged now")
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

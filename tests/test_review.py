"""The review page, run tables and terminal summary, built from small hand-made masks.

Check values: counts recomputed by brute force from the masks (definition of
occupancy); the PNG signature b"\\x89PNG\\r\\n\\x1a\\n" (PNG specification, ISO/IEC 15948);
GPS L1 at 1575.42 MHz (IS-GPS-200); SK thresholds of Nita & Gary 2010b, Table 1
(M = 300, N = 10, d = 1, type III: 0.76754 and 1.28212).
"""

import base64
import csv
import io
import os
import subprocess
from html.parser import HTMLParser

import h5py
import numpy as np
import pytest

from rfisieve import bits

from rfisieve.review import occupancy as occ

from rfisieve.review import page as review

PRODUCTS = ["pier1.a-pier1.a", "pier1.a-pier2.a", "pier2.a-pier2.a"]
PNG_SIG = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


def make_mask(path, nt, freq, seed, band="L", t0=1.8e9, gnss_chan=None):
    rng = np.random.default_rng(seed)
    nc = len(freq)
    m = np.where(rng.random((nt, nc, 3)) < 0.05, bits.SUMTHRESHOLD, 0).astype(np.uint8)
    m |= np.where(rng.random((nt, nc, 3)) < 0.03, bits.SK, 0).astype(np.uint8)
    if gnss_chan is not None:
        m[:, gnss_chan, :] |= bits.KNOWN
    with h5py.File(path, "w") as f:
        f.create_dataset("flags", data=m)
        f.create_dataset("time", data=t0 + 2.0 * np.arange(nt))
        f.create_dataset("freq", data=np.asarray(freq, float))
        f.create_dataset("products", data=np.array(PRODUCTS, dtype=h5py.string_dtype()))
        f.attrs["band"] = band
        g = f.create_group("diagnostics/sk")
        edges = np.linspace(0.0, 3.0, 301)
        # SK values drawn from a normal law with the Nita et al. (2007) variance for N = d = 1
        mm = 64
        sd = np.sqrt(4 * mm**2 / ((mm - 1) * (mm + 2) * (mm + 3)))
        vals = rng.normal(1.0, sd, 20000)
        g.create_dataset("edges", data=edges)
        g.create_dataset("counts", data=np.stack([np.histogram(vals, edges)[0], np.zeros(300, np.int64),
                                                  np.histogram(vals, edges)[0]]).astype(np.int64))
        g.attrs.update(m=mm, n=1, d=1.0, lower=0.5, upper=1.7, mode="s2", pfa=0.0013499, method="pearson3")
    return m


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    out = tmp_path_factory.mktemp("run")
    (out / "flags").mkdir()
    (out / "occupancy").mkdir()
    freq = 1570e6 + 1e6 * np.arange(12)          # 1570 .. 1581 MHz: channel 5 = 1575 MHz, inside GPS L1
    masks = {"night_a": make_mask(out / "flags" / "night_a.h5", 30, freq, 1, gnss_chan=5),
             "night_b": make_mask(out / "flags" / "night_b.h5", 50, freq[2:], 2, t0=1.8e9 + 100, gnss_chan=3)}
    occs = []
    for name in masks:
        occs.append(str(out / "occupancy" / f"{name}.h5"))
        assert occ._cmd_occupancy(type("A", (), dict(mask=str(out / "flags" / f"{name}.h5"),
                                                     csv=str(out / "occupancy" / f"{name}.csv"),
                                                     h5=occs[-1], chunk_dumps=7, image_bins=512))()) == 0
    index = review.build_review(str(out), occs)
    return out, masks, freq, index


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.tags, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "img":
            self.imgs.append(dict(attrs)["src"])

    def handle_data(self, data):
        self.text.append(data)


def test_page_parses_and_every_image_decodes(run):
    out, masks, freq, index = run
    assert index == str(out / "report" / "index.html")
    page = open(index, encoding="utf-8").read()
    p = _Collect()
    p.feed(page)
    p.close()
    assert "html" in p.tags and "table" in p.tags
    # the night + 1 band + 2 scan images + 1 kurtosis plot (both scans' SK pooled: one band,
    # one SK setting; neither fails its own check)
    assert len(p.imgs) == 5
    import matplotlib.image as mpimg
    for src in p.imgs:
        assert src.startswith("data:image/png;base64,")   # self-contained: nothing loaded from disk
        raw = base64.b64decode(src.split(",", 1)[1])
        assert raw[:8] == PNG_SIG
        img = mpimg.imread(io.BytesIO(raw), format="png")
        assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100
        assert float(img[..., :3].std()) > 0.01          # not blank
    text = " ".join(p.text)
    assert "GPS L1" in text                               # the 1575 MHz channel is annotated (IS-GPS-200)
    for name in ("band_L.png", "scan_night_a.png", "scan_night_b.png", "kurtosis_L_0.png"):
        assert (out / "report" / name).read_bytes()[:8] == PNG_SIG


def test_a_night_of_many_scans_links_the_scan_figures(run, tmp_path, monkeypatch):
    """Beyond EMBED_SCANS scans the scans' figures are relative links (loaded lazily) to the
    PNG files beside the page; the night's own figures stay inside it."""
    from rfisieve.review import html as review_html

    out, _, _, _ = run
    new = tmp_path / "run"
    for sub in ("flags", "occupancy"):
        (new / sub).mkdir(parents=True)
        for f in (out / sub).glob("night_*"):
            (new / sub / f.name).write_bytes(f.read_bytes())
    monkeypatch.setattr(review_html, "EMBED_SCANS", 1)
    occs = sorted(str(p) for p in (new / "occupancy").glob("night_*.h5"))
    index = review.build_review(str(new), occs)
    p = _Collect()
    p.feed(open(index, encoding="utf-8").read())
    p.close()
    linked = [src for src in p.imgs if not src.startswith("data:")]
    assert sorted(linked) == ["scan_night_a.png", "scan_night_b.png"]
    for src in linked:   # resolved against the page's directory, as a browser does
        assert (new / "report" / src).read_bytes()[:8] == PNG_SIG
    assert len(p.imgs) - len(linked) == 3   # night, band and kurtosis figures embedded
    assert "more than 1" in " ".join(p.text)


def test_run_csv_is_the_sample_weighted_sum(run):
    out, masks, freq, _ = run
    with open(out / "occupancy" / "run.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 12 and {r["band"] for r in rows} == {"L"}
    a, b = masks["night_a"], masks["night_b"]
    for ch, r in enumerate(rows):
        fl = np.count_nonzero(a[:, ch])
        sm = a[:, ch].size
        if ch >= 2:
            fl += np.count_nonzero(b[:, ch - 2])
            sm += b[:, ch - 2].size
        assert int(r["samples"]) == sm
        assert float(r["flagged_fraction"]) == pytest.approx(fl / sm, rel=1e-9)
        assert int(r["scans"]) == (2 if ch >= 2 else 1)


def test_summary_lists_gnss_range(run, capsys):
    out, *_ = run
    text = review.summary_text(str(out))
    assert "GPS L1" in text and "night_a" in text and "any cause" in text
    lines = [ln for ln in text.splitlines() if ln.startswith("L ") and "GPS L1" in ln]
    assert lines, text
    assert "1574.500" in lines[0] and "1575.500" in lines[0]   # the static channel at 1575 MHz


def test_change_since_previous_run(run, tmp_path):
    out, *_ = run
    prev = tmp_path / "prev.csv"
    with open(out / "occupancy" / "run.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    head = rows[0]
    for r in rows[1:]:
        r[head.index("flagged_fraction")] = "0"
    with open(prev, "w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    scans = sorted(str(p) for p in (out / "occupancy").glob("night_*.h5"))
    dest = tmp_path / "again"
    index = review.build_review(str(dest), scans, previous=str(prev))
    assert (dest / "report" / "change_L.png").read_bytes()[:8] == PNG_SIG
    assert "Change since the previous run" in open(index, encoding="utf-8").read()


def test_kurtosis_summary_sees_a_wrong_m():
    # SK values with the spread for M = 64 (Nita et al. 2007 variance), judged against M = 64 and M = 16
    rng = np.random.default_rng(7)
    sd = np.sqrt(4 * 64**2 / (63 * 66 * 67))
    edges = np.linspace(0, 3, 301)
    counts = np.histogram(rng.normal(1, sd, 50000), edges)[0][None, :]
    from rfisieve.review.plots import sk_summary
    ok = sk_summary({"edges": edges, "counts": counts, "attrs": {"m": 64, "n": 1, "d": 1.0}})[0]
    bad = sk_summary({"edges": edges, "counts": counts, "attrs": {"m": 16, "n": 1, "d": 1.0}})[0]
    assert 0.9 < ok["ratio"] < 1.1
    assert bad["ratio"] < 0.7


def test_expected_curve_uses_published_thresholds():
    # Nita & Gary 2010b Table 1: M = 300, N = 10, d = 1, type III thresholds 0.76754 / 1.28212 at 0.13499 %
    from rfisieve.review.plots import expected_sk_pdf
    _, dist, mean, var, note = expected_sk_pdf(np.array([1.0]), 300, 10, 1.0)
    assert mean == pytest.approx(1.0)
    assert dist.ppf(0.0013499) == pytest.approx(0.76754, abs=2e-3)
    assert dist.ppf(1 - 0.0013499) == pytest.approx(1.28212, abs=2e-3)


@pytest.mark.parametrize("m,n,d", [(8, 1, 1.0), (64, 1, 1.0), (300, 10, 1.0), (1024, 4, 0.5), (100000, 1, 1.0)])
def test_pearson3_without_scipy_stats_is_scipy_stats_pearson3(m, n, d):
    # scipy.stats.pearson3 itself (the reference implementation): the review's own copy
    # must give the very same numbers (bit for bit), so the figures and page do not change
    from scipy import stats

    from rfisieve.detect.kurtosis_moments import sk_moments
    from rfisieve.review.plots import pearson3

    mean, var, skew, _ = sk_moments(m, n, d)
    ours, ref = pearson3(skew, mean, np.sqrt(var)), stats.pearson3(skew, loc=mean, scale=np.sqrt(var))
    x, q = np.linspace(-1.0, 4.0, 5001), np.linspace(0.0, 1.0, 2001)
    for name, arg in (("pdf", x), ("cdf", x), ("ppf", q)):
        np.testing.assert_array_equal(getattr(ours, name)(arg), getattr(ref, name)(arg), err_msg=name)
        for v in (0.0, 1e-9, 0.7, 1.0):
            got, want = getattr(ours, name)(v), getattr(ref, name)(v)
            assert np.shape(got) == np.shape(want) and (got == want or np.isnan(got) and np.isnan(want)), (name, v)


CHROMIUM = "/usr/bin/chromium"


@pytest.mark.skipif(not os.path.exists(CHROMIUM), reason="headless Chromium not installed")
def test_page_renders_in_headless_chromium(run, tmp_path):
    out, *_ = run
    shot = tmp_path / "shot.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1400,3000",
           "file://" + str(out / "report" / "index.html")]
    subprocess.run(cmd, check=False, capture_output=True, timeout=120)
    assert shot.exists() and shot.read_bytes()[:8] == PNG_SIG
    import matplotlib.image as mpimg
    img = mpimg.imread(str(shot))
    assert img.shape[0] >= 2000 and float(img[..., :3].std()) > 0.02   # something is drawn


def test_cli_help_and_bad_input(tmp_path, capsys):
    import argparse
    parser = argparse.ArgumentParser(prog="rfisieve")
    sub = parser.add_subparsers()
    occ.register_cli(sub)
    review.register_cli(sub)
    for name in ("occupancy", "review", "summary"):
        with pytest.raises(SystemExit) as e:
            parser.parse_args([name, "--help"])
        assert e.value.code == 0
    # errors are printed as one line by the real entry point, exit 2
    from rfisieve.cli import main

    assert main(["summary", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "run.h5" in err and err.count("\n") == 1


# ---------------------------------------------------------------------------
# issue 13: a page the scientist trusts at 9 am
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("sigma", [3.0, 4.0, 5.0, 6.0])
@pytest.mark.parametrize("m", [8, 16, 64, 256, 1024])
def test_sk_histogram_range_covers_both_thresholds(sigma, m):
    # thresholds from the public API; PFA per tail = Gaussian tail beyond sigma (scipy.stats.norm.sf)
    from scipy.stats import norm

    from rfisieve.engine.planes import sk_histogram_edges
    from rfisieve.review.plots import sk_ranges, sk_summary
    from rfisieve.sk import sk_thresholds

    lower, upper = sk_thresholds(m, 1, 1.0, pfa=norm.sf(sigma))
    edges = sk_histogram_edges(lower, upper, m, 1, 1.0)
    w = np.diff(edges)
    nuni = min(len(w) - 1, 8192)
    assert np.allclose(w[:nuni], w[0])                           # uniform bins first ...
    assert np.all(w[nuni:-1] >= w[0] * (1 - 1e-9))               # ... then only wider ones
    assert edges[0] <= lower and edges[-2] > upper               # the last bin only clips values beyond
    # SK <= M N d + 1 (S2/S1^2 <= 1, from the definition): the bins always reach it, so
    # no SK value can lie beyond the histogram
    assert edges[-2] >= m + 1.0
    # a histogram with both tails: the drawn ranges hold both thresholds
    counts = np.zeros(len(edges) - 1, np.int64)
    centre = np.searchsorted(edges, 1.0) - 1
    counts[centre] = 1000
    low = np.searchsorted(edges, lower) - 2        # a bin wholly below the lower threshold, if any
    if low >= 0:
        counts[low] = 5
    counts[np.searchsorted(edges, upper) + 1] = 5
    summ = sk_summary({"edges": edges, "counts": counts,
                       "attrs": {"m": m, "n": 1, "d": 1.0, "lower": lower, "upper": upper}})[0]
    core, whole = sk_ranges(summ, counts, edges)
    for lo, hi in (core, whole):
        assert lo <= lower < upper <= hi
    assert summ["beyond"] == 0 and not summ["cut_off"]
    assert summ["outside"] == pytest.approx(counts[counts < 1000].sum() / counts.sum())


def _sk_case(edges, counts, upper):
    return {"edges": edges, "counts": np.asarray(counts)[None, :],
            "attrs": {"m": 16, "n": 1, "d": 1.0, "lower": 0.3, "upper": upper, "mode": "block"}}


def test_kurtosis_card_says_check_when_sk_flags_lie_beyond_the_histogram(tmp_path):
    from rfisieve.review.plots import sk_diagnostic, sk_summary

    rng = np.random.default_rng(3)
    sd = np.sqrt(4 * 16**2 / (15 * 18 * 19))      # Var of SK for N = d = 1 (Nita et al. 2007)
    # the case: fixed edges 0..3, sigma 4 at M = 16 puts the upper threshold at 3.17;
    # 7,840 SK values above it were clipped into the last bin
    edges = np.linspace(0, 3, 301)
    vals = np.clip(np.concatenate([rng.normal(1, sd, 50000), np.full(7840, 5.0)]), 0, 3 - 1e-9)
    counts = np.histogram(vals, edges)[0]
    old = sk_summary(_sk_case(edges, counts, 3.17))[0]
    assert old["verdict"] == "check" and old["cut_off"] and old["beyond"] >= 7840
    assert old["outside"] is None                 # not "0.00 %": unknown
    # new edges reach past the threshold, but values beyond their end still mean "check"
    edges = np.linspace(0, 4.0, 401)
    ok = np.histogram(rng.normal(1, sd, 50000), edges)[0]
    assert sk_summary(_sk_case(edges, ok, 3.17))[0]["verdict"] == "ok"
    beyond = ok.copy()
    beyond[-1] += 12
    summ = sk_summary(_sk_case(edges, beyond, 3.17))[0]
    assert summ["verdict"] == "check" and summ["beyond"] == 12
    assert sk_diagnostic(tmp_path / "k.png", _sk_case(edges, beyond, 3.17))["verdict"] == "check"
    assert (tmp_path / "k.png").read_bytes()[:8] == PNG_SIG
    # and the page's card says it
    from rfisieve.review.page import render_page

    html_text = render_page(str(tmp_path), [], {}, [], [], {"band": {}, "scan": {}, "kurtosis": []}, {"s": summ},
                            None, 0.2, None)
    overview = html_text.split('id="overview"')[1].split('id="failed"')[0]
    assert '<div class="v">check</div><div class="k">kurtosis check' in overview and ">ok<" not in overview


def test_time_axis_is_utc_clock_time_across_midnight(tmp_path):
    import datetime as dt

    from rfisieve.review.plots import scan_image, utc_ticks

    t0 = dt.datetime(2026, 12, 1, 23, 40, tzinfo=dt.timezone.utc).timestamp()
    ticks, labels = utc_ticks(t0, t0 + 3600)       # 23:40 .. 00:40 UTC
    assert labels[0] == "23:40" and "00:00" in labels and labels[-1] == "00:40"
    for t, lab in zip(ticks, labels):
        assert lab == dt.datetime.fromtimestamp(t, tz=dt.timezone.utc).strftime("%H:%M")   # stdlib datetime
    # a rendered scan image: its time axis carries these labels
    nt, nc = 1801, 16                              # 2 s dumps: 23:40:00 .. 00:40:00
    m = np.zeros((nt, nc, 1), np.uint8)
    m[::7, 3] = bits.SUMTHRESHOLD
    counts = occ.mask_counts(m, image_bins=(64, 16))
    counts.update(time=t0 + 2.0 * np.arange(nt), freq=1.4e9 + 1e6 * np.arange(nc), products=["a-a"],
                  attrs={"scan": "s", "band": "L", "ntime": nt})
    import matplotlib.pyplot as plt

    seen = {}
    orig = plt.Figure.savefig

    def grab(fig, *a, **k):
        for ax in fig.axes:
            seen.setdefault("y", []).extend(t.get_text() for t in ax.get_yticklabels())
            seen.setdefault("ylabel", []).append(ax.get_ylabel())
            seen.setdefault("xlabel", []).append(ax.get_xlabel())
        return orig(fig, *a, **k)

    plt.Figure.savefig = grab
    try:
        scan_image(tmp_path / "s.png", counts)
    finally:
        plt.Figure.savefig = orig
    times = [t for t in seen["y"] if ":" in t]
    assert "00:00" in times and any(t.startswith("23:") for t in times)
    assert all(len(t) == 5 and t[2] == ":" for t in times)
    assert any("UTC" in lab for lab in seen["ylabel"])
    assert any("2026-12-01 23:40 to 2026-12-02 00:40 UTC" in lab for lab in seen["xlabel"])


def test_a_reused_scan_figure_keeps_nothing_of_the_scan_before(tmp_path):
    # scan_image builds its figure once per process and draws each scan into it: the
    # second scan's PNG must equal the one a freshly built figure gives (pixel for pixel),
    # whatever the first scan's size, data range and time span were
    import matplotlib.image as mimg

    from rfisieve.review import plots as rp

    def counts_of(nt, nc, t0, seed):
        rng = np.random.default_rng(seed)
        m = (rng.random((nt, nc, 2)) < rng.uniform(0.01, 0.3)).astype(np.uint8) * bits.SUMTHRESHOLD
        c = occ.mask_counts(m, image_bins=(min(nt, 64), min(nc, 32)))
        c.update(time=t0 + 1.5 * np.arange(nt), freq=1.2e9 + 0.5e6 * np.arange(nc), products=["a-a", "b-b"],
                 attrs={"scan": f"s{seed}", "band": "L", "ntime": nt})
        data = rng.normal(seed, 1 + seed, c["image/flagged"].shape)
        data[0, 0] = np.nan
        return c, data

    first, d1 = counts_of(900, 48, 1.8e9, 1)
    second, d2 = counts_of(300, 20, 1.8e9 + 5e4, 2)
    for with_data in (True, False):
        rp._SCAN_LAYOUTS.clear()
        rp.scan_image(tmp_path / "fresh.png", second, data=d2 if with_data else None)
        rp._SCAN_LAYOUTS.clear()
        rp.scan_image(tmp_path / "a.png", first, data=d1 if with_data else None)
        rp.scan_image(tmp_path / "b.png", second, data=d2 if with_data else None)
        assert np.array_equal(mimg.imread(tmp_path / "b.png"), mimg.imread(tmp_path / "fresh.png"))
        assert not np.array_equal(mimg.imread(tmp_path / "a.png"), mimg.imread(tmp_path / "fresh.png"))


def test_page_names_failed_scans_and_the_settings_diff(run, tmp_path):
    out, *_ = run
    scans = sorted(str(p) for p in (out / "occupancy").glob("night_*.h5"))
    dest = tmp_path / "night2"
    dest.mkdir()
    (dest / "failed_scans.csv").write_text(
        "scan,path,stage,reason\n"
        "qro_20261202_0133_L,/data/qro_20261202_0133_L.h5,detect,/data/qro_20261202_0133_L.h5: not an HDF5 "
        "file (truncated, or another format)\n")
    # the previous run: same occupancy except a few channels; its settings had chi1 = 8
    prev_dir = tmp_path / "prev" / "occupancy"
    prev_dir.mkdir(parents=True)
    with open(out / "occupancy" / "run.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    rows[1][rows[0].index("flagged_fraction")] = "0.5"
    with open(prev_dir / "run.csv", "w", newline="") as fh:
        csv.writer(fh).writerows(rows)
    import json

    old = {"L": {"band": "L", "sumthreshold": {"chi1": 8.0, "rho": 1.5}, "kurtosis": {"sigma": 4.0}}}
    new = {"band": "L", "sumthreshold": {"chi1": 7.5, "rho": 1.5}, "kurtosis": {"sigma": 4.0}}
    with h5py.File(prev_dir / "run.h5", "w") as f:
        f.attrs["band_settings_json"] = json.dumps(old)
    for name in ("night_a", "night_b"):       # the masks of this run record the settings used
        with h5py.File(out / "flags" / f"{name}.h5", "a") as f:
            f.attrs["band_settings"] = json.dumps(new)
            f.attrs["rfisieve_version"] = "0.1.0"
    index = review.build_review(str(dest), scans, previous=str(prev_dir / "run.csv"))
    p = _Collect()
    p.feed(open(index, encoding="utf-8").read())
    text = " ".join(p.text)
    assert "qro_20261202_0133_L" in text and "not an HDF5 file" in text
    top = text.split("Most occupied channel ranges")[0]
    assert "qro_20261202_0133_L" in top                       # near the top, before the ranges
    assert "sumthreshold.chi1" in text and "8" in text and "7.5" in text
    change = text.split("Change since the previous run")[1].split("Scans")[0]
    assert "sumthreshold.chi1" in change and "rho" not in change  # only what changed
    assert "rfisieve 0.1.0" in text
    page = open(index, encoding="utf-8").read()
    assert "white-space: nowrap" in page and " %<" not in page     # cells do not wrap ("10.5 / %")


def test_unchanged_band_gets_one_line_and_no_previous_says_how(run, tmp_path):
    out, *_ = run
    scans = sorted(str(p) for p in (out / "occupancy").glob("night_*.h5"))
    index = review.build_review(str(tmp_path / "a"), scans, previous=str(out / "occupancy" / "run.csv"))
    page = open(index, encoding="utf-8").read()
    change = page.split('id="change"')[1].split('id="scans"')[0]
    assert "occupancy unchanged" in change and "<table" not in change
    index = review.build_review(str(tmp_path / "b"), scans)
    change = open(index, encoding="utf-8").read().split('id="change"')[1].split('id="scans"')[0]
    assert "previous_run" in change and "--previous" in change


def test_engine_mask_opens_with_gzip_alone_and_the_page_shows_the_data(tmp_path):
    # gzip (deflate) is built into every HDF5 library (HDF5 docs, H5Z_FILTER_DEFLATE); LZF is not
    import json

    from scanfactory import make_scan

    from rfisieve.config.defaults import band_settings, run_settings
    from rfisieve.engine import flag_scan

    scan = tmp_path / "scans" / "qro_gz_L.h5"
    scan.parent.mkdir()
    make_scan(scan, ntime=300, nchan=32, nprod=2, seed=4)
    band = band_settings({"band": "L"})
    band["protect"] = [{"start_mhz": 0.0, "stop_mhz": 1e6, "reason": "test: the whole band", "source": "this test"}]
    out = tmp_path / "out"
    mask = out / "flags" / "qro_gz_L.h5"
    flag_scan(scan, mask, band, run_settings({"chunk_dumps": 128}))
    with h5py.File(mask, "r") as f:
        assert f["flags"].compression == "gzip"
        assert f["flags"].compression_opts is not None and h5py.h5z.filter_avail(h5py.h5z.FILTER_DEFLATE)
        assert f["flags"][()].shape == (300, 32, 2)
        assert "s since 1970" in f["time"].attrs["units"] and "Hz" in f["freq"].attrs["units"]
        g = f["diagnostics/sk"]
        edges = g["edges"][()]
        assert edges[0] <= g.attrs["lower"] < g.attrs["upper"] < edges[-2]
        assert g["counts"].shape[-1] == len(edges) - 1
    occ_h5 = out / "occupancy" / "qro_gz_L.h5"
    occ.occupancy_of_mask(mask, out / "occupancy" / "qro_gz_L.csv", occ_h5)
    index = review.build_review(str(out), [str(occ_h5)])
    page = open(index, encoding="utf-8").read()
    assert "Data not shown" not in page                      # the scan file was read for the data image
    assert "test: the whole band" in page and "flagged inside" in page
    assert json.loads(h5py.File(out / "occupancy" / "run.h5", "r").attrs["band_settings_json"])["L"]["protect"]


def test_scan_csv_names_fractions_and_gives_the_time_span(run):
    out, *_ = run
    with open(out / "occupancy" / "night_a.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    r = rows[0]
    assert r["first_dump_utc"] == "2027-01-15T08:00:00Z"        # 1.8e9 s after 1970-01-01 (stdlib datetime)
    assert r["last_dump_utc"] == "2027-01-15T08:00:58Z"         # 29 dumps of 2 s later
    assert "flagged_fraction" in r and "sk_fraction" in r and "flagged_fraction_pier1.a-pier1.a" in r
    assert "flagged" not in r


def test_a_night_where_every_scan_failed_still_gets_a_page(tmp_path):
    (tmp_path / "failed_scans.csv").write_text(
        "scan,path,stage,reason\nqro_x_L,/d/qro_x_L.h5,plan,/d/qro_x_L.h5: no such file\n")
    from rfisieve.cli import main

    assert main(["review", str(tmp_path)]) == 0
    page = (tmp_path / "report" / "index.html").read_text(encoding="utf-8")
    assert "qro_x_L" in page and "no such file" in page


def test_decade_labels_of_log_axes():
    # Check values from the definition of a decade: 10**e for whole e, written as
    # 10 with the exponent in Unicode superscripts (U+207B minus, U+2070.. digits;
    # the Unicode standard's superscript block), 1, 10 and 100 plainly; values between
    # decades unlabelled.
    from rfisieve.review.plots import decade_label

    assert [decade_label(v) for v in (1e-6, 1e-1, 1.0, 10.0, 100.0, 1e3, 1e12)] == \
        ["10\u207b\u2076", "10\u207b\u00b9", "1", "10", "100", "10\u00b3", "10\u00b9\u00b2"]
    assert [decade_label(v) for v in (2.0, 3e-5, 0.0, -10.0)] == ["", "", "", ""]

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
    # 1 band + 2 scan images + 2 kurtosis plots
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
    for name in ("band_L.png", "scan_night_a.png", "scan_night_b.png", "kurtosis_night_a.png"):
        assert (out / "report" / name).read_bytes()[:8] == PNG_SIG


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
        assert float(r["flagged"]) == pytest.approx(fl / sm, rel=1e-9)
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
        r[head.index("flagged")] = "0"
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

"""Two polarizations detected together in the engine: which products pair up, the
combined detection's gain, a product hit alone, and chunk invariance with pairs."""

import math

import h5py
import numpy as np
import pytest

from rfisieve.config.defaults import band_settings, run_settings
from rfisieve.engine import detect, flag_scan, merge, plan_scan
from rfisieve.engine.planes import feed_groups

N_ACC = 256
SIGMA = 1 / math.sqrt(N_ACC)     # relative noise of a dump (radiometer equation)


@pytest.mark.parametrize("products, groups", [
    # one antenna's two feeds pair up; a cross product and another antenna's lone feed do not
    (["pier1.a-pier1.a", "pier1.b-pier1.b", "pier1.a-pier1.b", "pier2.a-pier2.a"], [(0, 1), (2,), (3,)]),
    # pairs follow the antenna, not the order of the products
    (["pier1.a-pier1.a", "pier2.a-pier2.a", "pier2.b-pier2.b", "pier1.b-pier1.b"], [(0, 3), (1, 2)]),
    # unclear pairing falls back to one product per task: no feed suffix, three feeds,
    # the same feed twice cannot occur (products are unique), dots in the antenna name
    (["ant1-ant1", "ant2-ant2"], [(0,), (1,)]),
    (["pier1.a-pier1.a", "pier1.b-pier1.b", "pier1.c-pier1.c"], [(0,), (1,), (2,)]),
    (["site.pier1.x-site.pier1.x", "site.pier1.y-site.pier1.y"], [(0, 1)]),
])
def test_feed_groups_rule(products, groups):
    assert feed_groups(products) == groups
    assert feed_groups(products, combine=False) == [(p,) for p in range(len(products))]


def _write(path, data, products):
    n, m, _ = data.shape
    with h5py.File(path, "w") as f:
        f["data"] = data.astype(np.float32)
        f["time"] = 1.8e9 + np.arange(n) * 1.0
        f["freq"] = 1.30e9 + np.arange(m) * 250e3
        f["products"] = np.array(products, dtype=object)
        f.attrs.update(band="L", integration_time=1.0, channel_width=250e3, accumulations=N_ACC)


def _band(combine, **st):
    return band_settings({"band": "L", "kurtosis": {"enabled": False},
                          "sumthreshold": dict(st, combine_feeds=combine)})


def _flags(scan, out, band, **run):
    flag_scan(scan, out, band, run_settings(dict({"chunk_dumps": 4096, "workers": 2}, **run)))
    with h5py.File(out, "r") as f:
        return f["flags"][()]


def _pair_scan(path, rng, n=512, m=256, strength=0.6, alone=False):
    """Two feeds of one antenna: 120 carriers of 64 dumps (20 channels x 6 stretches)
    at ``strength`` sigma in feed a and 0.8 of it in feed b; with ``alone`` a 6-sigma
    carrier in feed a only (channel 5)."""
    truth = np.zeros((n, m), bool)
    for c in range(8, 248, 12):
        for t in range(10, 411, 80):
            truth[t:t + 64, c] = True
    data = rng.gamma(N_ACC, 1.0 / N_ACC, (n, m, 2))
    for p, s in enumerate((1.0, 0.8)):
        data[:, :, p][truth] += strength * s * SIGMA
    if alone:
        data[:, 5, 0] += 6 * SIGMA
    _write(path, data, ["pier1.a-pier1.a", "pier1.b-pier1.b"])
    return truth


def test_engine_combining_the_pair_finds_carriers_neither_product_passes(tmp_path):
    # Check value: for strengths s and 0.8 s in two products with independent noise, the
    # sum of the normalised residuals over sqrt(2) carries 1.8 s / sqrt(2) = 1.27 s at
    # unit noise (sums of independent Gaussians; common practice).  A carrier of 64
    # dumps at s = 0.6 sigma (0.48 in feed b) is one window M = 64 whose mean has noise
    # 1 / sqrt(64) = 0.125; chi_64 = 8 / 1.5**6 = 0.70 (Offringa et al. 2010 thresholds).
    # Alone feed a lies 0.8 window sigma below it (a window passes with probability
    # norm.sf(0.8) = 0.21), feed b 1.8 below (0.04); combined (0.76) 0.5 above (0.69).
    # Of 120 carriers (binomial sd under 0.05), alone under a quarter is found, the
    # pair over twice that.  Windows that reach past a carrier's ends flag a few noise
    # samples next to it; channels without carriers stay clean.
    rng = np.random.default_rng(21)
    scan = tmp_path / "pair_L.h5"
    truth = _pair_scan(scan, rng)
    st = dict(max_window_time=64, max_window_freq=32)
    off = _flags(scan, tmp_path / "off.h5", _band(False, **st))
    on = _flags(scan, tmp_path / "on.h5", _band(True, **st))
    det = lambda mask, p: (mask[:, :, p] & 16) != 0          # the SumThreshold bit (bits.py)
    alone = max(det(off, p)[truth].mean() for p in range(2))
    both = np.mean([det(on, p)[truth].mean() for p in range(2)])
    assert alone < 0.25
    assert both > 2 * alone and both > 0.3
    free = ~truth.any(axis=0)
    assert max(det(on, p)[:, free].mean() for p in range(2)) < 0.001


def test_engine_a_product_hit_alone_is_still_flagged(tmp_path):
    # A 6-sigma carrier in feed a only passes chi_32 = 8 / 1.5**5 = 1.05 sigma on a's own
    # residual (Offringa et al. 2010 thresholds): flagged in a with the pair combined.
    rng = np.random.default_rng(22)
    scan = tmp_path / "alone_L.h5"
    _pair_scan(scan, rng, strength=0.0, alone=True)
    on = _flags(scan, tmp_path / "on.h5", _band(True))
    assert ((on[:, 5, 0] & 16) != 0).mean() > 0.99


@pytest.mark.parametrize("bandpass", [False, True])
def test_pairs_chunk_and_worker_invariant_and_stages_equal(tmp_path, bandpass):
    # The engine's guarantee (docs/design.md 5): the mask does not depend on where
    # chunks start nor on the number of workers; the staged path equals flag_scan.
    rng = np.random.default_rng(23)
    scan = tmp_path / "inv_L.h5"
    n, m = 3000, 64
    data = rng.gamma(N_ACC, 1.0 / N_ACC, (n, m, 3))
    data[:, 20, :2] *= 1 + 0.6 * SIGMA
    data[1000:1003, :, :] *= 1 + 5 * SIGMA
    _write(scan, data, ["pier1.a-pier1.a", "pier1.b-pier1.b", "pier2.a-pier2.a"])
    st = dict(background_freq=32.0, bandpass_dumps=256, persist_dumps=256, compact_sigma=4.5) if bandpass else {}
    band = band_settings({"band": "L", "sumthreshold": dict(st, combine_feeds=True)})
    whole = _flags(scan, tmp_path / "w.h5", band, chunk_dumps=4096, workers=1)
    for chunk, workers in ((700, 2), (1111, 1)):
        np.testing.assert_array_equal(_flags(scan, tmp_path / f"c{chunk}.h5", band, chunk_dumps=chunk,
                                             workers=workers), whole)
    run = run_settings({"chunk_dumps": 1111})
    plan = plan_scan(scan, band, run)
    parts = []
    for det in ("sk", "sumthreshold"):
        parts.append(tmp_path / f"{det}.h5")
        detect(scan, parts[-1], det, band, run, plan=plan)
    merge(scan, parts, tmp_path / "staged.h5", band, run)
    with h5py.File(tmp_path / "staged.h5", "r") as f:
        np.testing.assert_array_equal(f["flags"][()], whole)

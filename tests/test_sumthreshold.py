"""Tests of the SumThreshold operator and the iterated flagger."""

import math

import numpy as np
import pytest
from hypothesis import given, settings as hsettings, strategies as st
from hypothesis.extra import numpy as hnp

from rfisieve.detect.background import fit_background, robust_sigma
from rfisieve.config.defaults import BAND_DEFAULTS
from rfisieve.detect.sumthreshold import (sumthreshold, sumthreshold_1d, sumthreshold_flagger,
                                   grid_unit, sumthreshold_halo, sumthreshold_noise,
                                   threshold_factors, to_grid, window_sizes)


def brute_sumthreshold(x, flagged, invalid, chi1, rho, max_window):
    """SumThreshold along axis 0 straight from the definition (Offringa et al. 2010,
    MNRAS 405, 155, sect. 3; docs/design.md 4): for M = 1, 2, 4, ..., a run of M
    consecutive (valid) samples is flagged when its mean exceeds
    chi_M = chi_1 / rho**log2(M); samples flagged before the pass enter at chi_M;
    invalid samples are left out of the line."""
    out = np.zeros(x.shape, bool)
    for c in range(x.shape[1]):
        idx = np.flatnonzero(~invalid[:, c])
        v = x[idx, c].astype(np.float64)
        f = flagged[idx, c]
        det = np.zeros(len(v), bool)
        M = 1
        while M <= max_window:
            chi = chi1 / rho ** math.log2(M)
            vals = np.where(f | det, chi, v)
            new = np.zeros(len(v), bool)
            for i in range(len(v) - M + 1):
                if vals[i:i + M].sum() / M > chi:
                    new[i:i + M] = True
            det |= new & ~f
            M *= 2
        out[idx, c] = det
    return out


planes = st.integers(1, 40).flatmap(lambda n: st.integers(1, 5).flatmap(lambda m: st.tuples(
    hnp.arrays(np.float32, (n, m), elements=st.integers(-3, 12).map(float)),
    hnp.arrays(np.bool_, (n, m), elements=st.booleans()),
    hnp.arrays(np.bool_, (n, m), elements=st.sampled_from([False, False, False, True])),
)))


@hsettings(max_examples=150, deadline=None)
@given(planes, st.sampled_from([1, 2, 4, 8, 16]), st.sampled_from([0, 1]))
def test_sumthreshold_equals_definition(data, max_window, axis):
    # rho = 2, chi1 = 8: every chi_M (8, 4, 2, 1, 0.5) and every sum of the integer
    # samples is exact in float64, so ties are decided identically.
    x, flagged, invalid = data
    flagged = flagged & ~invalid
    got = sumthreshold(x, flagged, chi1=8.0, rho=2.0, max_window=max_window, axis=axis,
                       invalid=invalid)
    if axis == 0:
        want = brute_sumthreshold(x, flagged, invalid, 8.0, 2.0, max_window)
    else:
        want = brute_sumthreshold(x.T, flagged.T, invalid.T, 8.0, 2.0, max_window).T
    np.testing.assert_array_equal(got, want)


clipped_planes = st.integers(1, 40).flatmap(lambda n: st.integers(1, 4).flatmap(lambda m: st.tuples(
    hnp.arrays(np.float32, (n, m), elements=st.sampled_from(
        [-1e30, -1e6, -300.0, -129.0, -3.0, -1.0, 0.0, 1.0, 3.0, 5.0, 7.0, 9.0, 12.0, 17.0, 1e6, 1e30])),
    hnp.arrays(np.bool_, (n, m), elements=st.booleans()),
)))


@hsettings(max_examples=150, deadline=None)
@given(clipped_planes, st.sampled_from([2, 4, 16, 128, 256]))
def test_grid_clip_changes_no_result(data, max_window):
    # grid_unit's claim: values clipped to [-M_max chi_1, 2 chi_1] before the integer
    # sums decide every window as the unclipped float64 definition does.  chi1 = 8,
    # rho = 2: the unclipped values and every chi_M are exact on the grid, so only
    # the clip is under test (windows to 16: -129 and -300 lie below -16 chi_1 =
    # -128; always: 17, 1e6 and 1e30 above 2 chi_1 = 16, -1e6 and -1e30 below).
    x, flagged = data
    none = np.zeros(x.shape, bool)
    got = sumthreshold(x, flagged, chi1=8.0, rho=2.0, max_window=max_window)
    want = brute_sumthreshold(x, flagged, none, 8.0, 2.0, max_window)
    np.testing.assert_array_equal(got, want)


def test_grid_unit_and_rounding():
    # 32-bit grid up to windows of 128 (no sum of 128 samples of magnitude <= 128
    # chi_1 can pass 2**31), 64-bit beyond; a value is rounded to the nearest step.
    assert grid_unit(32) == (1 << 16, np.int32)
    assert grid_unit(128) == (1 << 16, np.int32)
    assert grid_unit(256) == (1 << 42, np.int64)
    assert grid_unit(1024) == (1 << 42, np.int64)
    assert 128 * 128 * grid_unit(128)[0] <= 2 ** 30
    assert 1024 * 1024 * grid_unit(1024)[0] <= 2 ** 62
    x = np.array([[1.0, 0.5, -2.0, 3.0, np.nan, 1.0 + 2 ** -17, 1.0 + 2 ** -15]], np.float32)
    g, unit = to_grid(x, 1.0, 4)
    assert unit == 1 << 16
    np.testing.assert_array_equal(g[0], [65536, 32768, -131072, 131072, -4 * 65536, 65536, 65538])
    g, unit = to_grid(np.zeros((2, 2), np.float32), 0.0, 4)      # no noise: thresholds 0
    assert unit == 0
    with pytest.raises(ValueError):
        to_grid(x, -1.0, 4)


def test_sumthreshold_random_floats_rho_1_5():
    # rho = 1.5 as in Offringa et al. 2010; random floats make ties improbable.
    rng = np.random.default_rng(5)
    for _ in range(20):
        n, m = rng.integers(5, 80), rng.integers(1, 6)
        x = rng.standard_normal((n, m)).astype(np.float32) * 2
        x[rng.random((n, m)) < 0.05] += 5
        flagged = rng.random((n, m)) < 0.1
        invalid = (rng.random((n, m)) < 0.1) & ~flagged
        if rng.random() < 0.3:
            invalid[rng.integers(n), :] = True     # a dropped dump
        got = sumthreshold(x, flagged, chi1=3.0, rho=1.5, max_window=32, invalid=invalid)
        want = brute_sumthreshold(x, flagged, invalid, 3.0, 1.5, 32)
        np.testing.assert_array_equal(got, want)


def test_sumthreshold_1d_worked_example():
    # Hand-worked from the definition: chi1 = 6, rho = 1.5 -> chi_2 = 4, chi_4 = 8/3.
    x = np.array([0, 7, 0, 0, 4.5, 4.5, 0, 3, 3, 3, 3, 0], np.float32)
    got = sumthreshold_1d(x, chi1=6.0, rho=1.5, max_window=4)
    want = np.zeros(12, bool)
    want[1] = True          # 7 > 6 (M = 1)
    want[4:6] = True        # mean 4.5 > 4 (M = 2)
    want[7:11] = True       # mean 3 > 8/3 (M = 4)
    np.testing.assert_array_equal(got, want)
    # an already-flagged sample enters at chi_M: [3, 3, flagged, 3] -> mean
    # (9 + 8/3) / 4 = 2.92 > 8/3, so the run is still found at M = 4
    x2 = np.array([0, 3, 3, 100, 3, 0], np.float32)
    f2 = np.array([0, 0, 0, 1, 0, 0], bool)
    got2 = sumthreshold_1d(x2, f2, chi1=6.0, rho=1.5, max_window=4)
    np.testing.assert_array_equal(got2, [0, 1, 1, 0, 1, 0])


def test_window_sizes_and_factors():
    assert window_sizes(32) == (1, 2, 4, 8, 16, 32)
    assert window_sizes(20) == (1, 2, 4, 8, 16)
    assert threshold_factors(3, 4.0) == pytest.approx((4.0, 2.0, 1.0))
    assert threshold_factors(1, 4.0) == (1.0,)


def _st_settings():
    s = dict(BAND_DEFAULTS["sumthreshold"])
    s.pop("enabled")
    return s


def _line_rfi_plane(rng, n=512, m=256, noise=0.01):
    """Simulated dynamic spectrum: smooth bandpass times slow gain, relative
    Gaussian noise (radiometer equation), and line-shaped RFI as in the simple
    simulated data of Offringa et al. 2010: narrowband lines long in time and
    broadband lines short in time, 1 to 5 sigma per sample."""
    t = np.arange(n)[:, None]
    f = np.arange(m)[None, :]
    bandpass = 1.0 + 0.3 * np.sin(f / 40.0) + 0.2 * (f / m)
    gain = 1.0 + 0.05 * np.sin(t / 150.0)
    rfi = np.zeros((n, m))
    truth = np.zeros((n, m), bool)
    for _ in range(12):                      # narrowband, long in time
        c = rng.integers(0, m)
        t0 = rng.integers(0, n - 64)
        ln = rng.integers(64, n - t0 + 1)
        rfi[t0:t0 + ln, c] += rng.uniform(1, 5) * noise
        truth[t0:t0 + ln, c] = True
    for _ in range(12):                      # broadband, short
        d = rng.integers(0, n)
        c0 = rng.integers(0, m - 32)
        ln = rng.integers(32, m - c0 + 1)
        w = rng.integers(1, 3)
        rfi[d:d + w, c0:c0 + ln] += rng.uniform(1, 5) * noise
        truth[d:d + w, c0:c0 + ln] = True
    x = bandpass * gain * (1.0 + noise * rng.standard_normal((n, m)) + rfi)
    return x.astype(np.float32), truth


def test_line_rfi_recall_and_false_positives():
    # Check value: Offringa et al. 2010, MNRAS 405, 155 report about 95 % of the
    # RFI recognised at about 0.1 % false positives on simple simulated
    # line-shaped RFI.  Band defaults of rfisieve.config.defaults except chi1 = 8
    # (recommended default): with chi1 = 6 this simulation gives recall 99.4 %
    # at 0.43 % false positives (line-end overshoot of the larger windows),
    # with chi1 = 8 recall 98.2 % at 0.054 %.
    s = _st_settings()
    s["chi1"] = 8.0
    rng = np.random.default_rng(2010)
    tp = fn = fp = tn = 0
    for _ in range(3):
        x, truth = _line_rfi_plane(rng)
        det = sumthreshold_flagger(x, **s)
        tp += np.sum(det & truth)
        fn += np.sum(~det & truth)
        fp += np.sum(det & ~truth)
        tn += np.sum(~det & ~truth)
    recall = tp / (tp + fn)
    fpr = fp / (fp + tn)
    print("recall %.4f  false-positive rate %.5f" % (recall, fpr))
    assert recall >= 0.95
    assert fpr <= 0.001


def test_invalid_values_do_not_matter():
    # Invalid samples are left out (docs/design.md 4, common practice): NaN at the
    # invalid positions gives the same result as finite garbage there.
    rng = np.random.default_rng(3)
    x, _ = _line_rfi_plane(rng, 256, 128)
    invalid = rng.random(x.shape) < 0.02
    invalid[100, :] = True
    invalid[:, 7] = True
    a = x.copy()
    a[invalid] = np.nan
    b = x.copy()
    b[invalid] = rng.choice([0.0, -5.0, 1e30, 3.0], size=invalid.sum())
    da = sumthreshold_flagger(a, invalid=invalid, **_st_settings())
    db = sumthreshold_flagger(b, invalid=invalid, **_st_settings())
    np.testing.assert_array_equal(da, db)
    assert not np.any(da & invalid)
    sa = sumthreshold(a, None, 3.0, 1.5, 32, 0, invalid)
    sb = sumthreshold(b, None, 3.0, 1.5, 32, 0, invalid)
    np.testing.assert_array_equal(sa, sb)


def test_flagger_one_iteration_is_the_documented_composition():
    # One iteration = background fit, r = x / B - 1, robust sigma, SumThreshold
    # along time on the input mask, then along frequency on the input mask
    # joined by the time detections, union (the docstring).  The flagger fits
    # the background with the coarse-grid fit (coarse=True).
    rng = np.random.default_rng(4)
    x, _ = _line_rfi_plane(rng, 200, 96)
    mask = rng.random(x.shape) < 0.01
    invalid = rng.random(x.shape) < 0.01
    invalid[50, :] = True
    mask &= ~invalid
    s = _st_settings()
    s.update(iterations=1)
    got = sumthreshold_flagger(x, mask, invalid=invalid, **s)
    bg = fit_background(x, mask, invalid, s["background_time"], s["background_freq"],
                        coarse=True)
    r = x / bg - 1
    sig = robust_sigma(np.where(invalid, 0, r), mask | invalid)
    c1 = s["chi1"] * sig
    want_t = sumthreshold(r, mask, c1, s["rho"], s["max_window_time"], 0, invalid)
    want = want_t | sumthreshold(r, mask | want_t, c1, s["rho"], s["max_window_freq"], 1, invalid)
    np.testing.assert_array_equal(got, want)


def test_chunk_independence_with_halo():
    # Two pieces with sumthreshold_halo dumps of halo on each side of the cut
    # give the whole-plane result on >= 99.99 % of samples (the brief's figure).
    # One noise sigma for the scan (sumthreshold_noise, passed as sigma): a
    # per-piece estimate differs by its sampling error (~0.3 %) and moves
    # ~0.02 % of the samples of this plane, whose RFI sits near the thresholds.
    rng = np.random.default_rng(6)
    x, _ = _line_rfi_plane(rng, 1024, 96)
    s = _st_settings()
    s["sigma"] = sumthreshold_noise(x, **_st_settings())
    h = sumthreshold_halo(BAND_DEFAULTS["sumthreshold"])
    cut = 512
    whole = sumthreshold_flagger(x, **s)
    a = sumthreshold_flagger(x[:cut + h], **s)[:cut]
    b = sumthreshold_flagger(x[cut - h:], t0=cut - h, **s)[h:]
    pieces = np.concatenate([a, b])
    agree = np.mean(pieces == whole)
    print("halo %d, agreement %.6f" % (h, agree))
    assert agree >= 0.9999


def test_halo_rule():
    # iterations * (sum_M (M - 1) + background reach), rounded up to a multiple
    # of the background's time cell: 3 * (57 + 44) = 303 -> 304 (cells of 8
    # dumps) for the defaults
    assert sumthreshold_halo(BAND_DEFAULTS["sumthreshold"]) == 304
    assert sumthreshold_halo({"enabled": False}) == 0
    assert sumthreshold_halo({"iterations": 1, "max_window_time": 1,
                              "background_time": 0}) == 0


def test_flagger_edge_cases():
    assert not sumthreshold_flagger(np.ones((0, 4), np.float32)).any()
    z = np.full((10, 10), np.nan, np.float32)
    assert not sumthreshold_flagger(z).any()
    c = np.ones((64, 32), np.float32)
    c[10, 5] = 100.0
    d = sumthreshold_flagger(c)
    assert d[10, 5]


def test_frequency_tiles_equal_definition():
    # SumThreshold along frequency on transposed tiles (several tiles, a partial
    # last one, wholly and partly invalid lines) against the definition.
    from rfisieve.detect.sumthreshold import _levels, _st_freq
    rng = np.random.default_rng(21)
    for n, m in ((150, 90), (17, 300), (70, 33)):
        x = (rng.standard_normal((n, m)) * 2).astype(np.float32)
        x[rng.random((n, m)) < 0.05] += 5
        flagged = rng.random((n, m)) < 0.1
        invalid = (rng.random((n, m)) < 0.03) & ~flagged
        invalid[:, rng.integers(m)] = True
        invalid[rng.integers(n), :] = True
        flagged &= ~invalid
        lev, rowbad, colbad = _levels((n, m), flagged, invalid)
        got = np.zeros((n, m), bool)
        xg, unit = to_grid(x, 3.0, 32)
        _st_freq(xg, lev, rowbad, colbad, unit, 1.5, 6, got, True)
        want = brute_sumthreshold(x.T, flagged.T, invalid.T, 3.0, 1.5, 32).T
        np.testing.assert_array_equal(got, want)


def test_time_sweep_long_windows():
    # All window passes in one sweep (ring buffer sized by the lags): windows to
    # 128 and lines longer than the ring, against the definition.
    rng = np.random.default_rng(22)
    x = (rng.standard_normal((400, 7)) * 2).astype(np.float32)
    x[100:300, 2] += 1.0
    flagged = rng.random(x.shape) < 0.05
    invalid = (rng.random(x.shape) < 0.02) & ~flagged
    invalid[:, 5] = False
    for mw in (64, 128, 256):
        got = sumthreshold(x, flagged, chi1=4.0, rho=1.5, max_window=mw, invalid=invalid)
        want = brute_sumthreshold(x, flagged, invalid, 4.0, 1.5, mw)
        np.testing.assert_array_equal(got, want)


def test_chunks_exact_with_the_whole_plane_noise(monkeypatch):
    # With the noise estimate of the whole plane (the only plane-wide quantity),
    # chunks cut at multiples of the background cell with sumthreshold_halo
    # dumps of halo reproduce the whole-plane result exactly: the halo covers
    # SumThreshold's and the coarse background's reach.
    import rfisieve.detect.sumthreshold as stm
    rng = np.random.default_rng(6)
    x, _ = _line_rfi_plane(rng, 1024, 96)
    s = _st_settings()
    h = sumthreshold_halo(BAND_DEFAULTS["sumthreshold"])
    real = stm.robust_sigma2
    record = []
    monkeypatch.setattr(stm, "robust_sigma2", lambda *a: record.append(real(*a)) or record[-1])
    whole = sumthreshold_flagger(x, **s)
    for cut in (512, 640):
        replay = iter(record * 2)
        monkeypatch.setattr(stm, "robust_sigma2", lambda *a: next(replay))
        a = sumthreshold_flagger(x[:cut + h], **s)[:cut]
        b = sumthreshold_flagger(x[cut - h:], **s)[h:]
        np.testing.assert_array_equal(np.concatenate([a, b]), whole)


def test_chunks_anywhere_exact_with_fixed_sigma_and_t0():
    # Pieces cut at arbitrary dumps (not multiples of the 8-dump background
    # cell), each with sumthreshold_halo dumps of halo, its absolute start t0 and
    # the scan's noise sigma, reproduce the whole-plane result exactly: the halo
    # covers SumThreshold's and the background's reach, t0 aligns the cells.
    s = _st_settings()
    h = sumthreshold_halo(BAND_DEFAULTS["sumthreshold"])
    for seed in range(3):
        rng = np.random.default_rng(100 + seed)
        x, _ = _line_rfi_plane(rng, 1024, 96)
        x[rng.random(x.shape) < 0.01] = np.nan        # invalid samples too
        sig = sumthreshold_noise(x, **s)
        whole = sumthreshold_flagger(x, sigma=sig, **s)
        cuts = [0] + sorted(rng.choice(np.arange(1, 1024), 3, replace=False).tolist()) + [1024]
        parts = []
        for a, b in zip(cuts[:-1], cuts[1:]):
            lo, hi = max(0, a - h), min(1024, b + h)
            parts.append(sumthreshold_flagger(x[lo:hi], sigma=sig, t0=lo, **s)[a - lo:b - lo])
        pieces = np.concatenate(parts)
        assert np.mean(pieces == whole) >= 0.9999
        np.testing.assert_array_equal(pieces, whole)


def test_noise_estimate_and_fixed_sigma():
    # sumthreshold_noise is the robust sigma of r = x / B - 1 at the last
    # iteration: on relative Gaussian noise of rms 0.01 (the simulation's
    # value) it is 0.01 within the MAD's sampling error plus the background's
    # own noise (a few per cent).  With sigma given, one iteration is the
    # documented composition with chi_1 = chi1 * sigma.
    rng = np.random.default_rng(8)
    x, _ = _line_rfi_plane(rng, 512, 128)
    s = _st_settings()
    sig = sumthreshold_noise(x, **s)
    assert sig == pytest.approx(0.01, rel=0.05)
    s1 = dict(s, iterations=1)
    got = sumthreshold_flagger(x, sigma=2 * sig, **s1)
    bg = fit_background(x, sigma_t=s["background_time"], sigma_f=s["background_freq"], coarse=True)
    r = x / bg - 1
    c1 = s["chi1"] * 2 * sig
    want_t = sumthreshold(r, None, c1, s["rho"], s["max_window_time"], 0)
    want = want_t | sumthreshold(r, want_t, c1, s["rho"], s["max_window_freq"], 1)
    np.testing.assert_array_equal(got, want)
    with pytest.raises(ValueError):
        sumthreshold_flagger(x, sigma=0.0)


def test_no_false_dumps_between_lines():
    # Defect found on the engine's scans: two strong narrowband lines (6 sigma,
    # all dumps) entered every frequency window crossing them at their full
    # value and raised whole dumps of pure noise above chi_32.  The frequency
    # pass now takes the time pass's detections as flagged (entering at chi_M,
    # Offringa et al. 2010).  Gamma(N)/N powers (radiometer equation), smooth
    # bandpass, lines at channels 12 and 32: no dump gets more than 5 false
    # samples (before the fix: 4 such dumps in these 6 seeds).
    n, m, N = 600, 64, 256
    ch = np.arange(m)
    bandpass = 1.0 + 0.3 * np.sin(np.pi * ch / m) + 0.03 * np.sin(2 * np.pi * ch / 30.0)
    false = 0
    for seed in range(6):
        rng = np.random.default_rng(seed)
        x = rng.standard_gamma(N, size=(n, m)) / N * bandpass
        truth = np.zeros((n, m), bool)
        for c in (12, 32):
            x[:, c] *= 1 + 6 / np.sqrt(N)
            truth[:, c] = True
        x[200:203] *= 1 + 8 / np.sqrt(N)
        truth[200:203] = True
        hit = sumthreshold_flagger(x.astype(np.float32), chi1=8.0)
        fa = hit & ~truth
        assert (fa.sum(axis=1) <= 5).all()
        assert hit[truth].mean() > 0.99
        false += fa.sum()
    assert false / (6 * n * (m - 2)) < 1e-4


def test_residual_straight_onto_the_grid_equals_to_grid_of_the_residual():
    # With a fixed noise sigma the flagger has the background's interpolation pass write
    # the residual straight onto SumThreshold's grid; it must be exactly to_grid(r).
    from rfisieve.detect.background import coarse_residual
    from rfisieve.detect.sumthreshold import _grid_args, _levels

    rng = np.random.default_rng(31)
    x, _ = _line_rfi_plane(rng, 300, 77)
    x[5, 7] = np.nan
    invalid = ~np.isfinite(x)
    ex = invalid | (rng.random(x.shape) < 0.02)
    lev, _, _ = _levels(x.shape, ex & ~invalid, invalid)
    none = np.zeros(x.shape, bool)
    for c1 in (0.02, 0.3, 5.0):
        for mw in (32, 128, 512):
            r = np.empty(x.shape, np.float32)
            coarse_residual(x, ex, none, lev, 15.0, 5.0, r, {}, 3)
            want, _ = to_grid(r, c1, mw)
            got = np.empty(x.shape, grid_unit(mw)[1])
            coarse_residual(x, ex, none, lev, 15.0, 5.0, got, {}, 3, grid=_grid_args(c1, mw))
            np.testing.assert_array_equal(got, want)

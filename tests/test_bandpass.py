"""The bandpass-following background, the persistence test, protected ranges and
chunk invariance of the L band's detection (rfisieve.detect.bandpass)."""

import math

import numpy as np

from rfisieve.detect.bandpass import block_bandpass, persistent_flags, block_lengths
from rfisieve.detect.sumthreshold import sumthreshold_flagger, sumthreshold_halo

N_ACC = 512                      # raw spectra per dump
SIGMA = 1 / math.sqrt(N_ACC)     # relative noise of a dump (radiometer equation)
L_BAND = dict(background_freq=32.0, bandpass_dumps=256, persist_dumps=256, persist_sigma=6.0,
              baseline_channels=64, compact_sigma=5.0)


def knee_bandpass(m, knee=24, drop=50.0, over=20.0, h=0.0):
    """Analytic bandpass: flat, then falling by `drop` over `over` channels beyond a
    sharp knee `knee` channels from each edge (exp of a piecewise-linear log); with
    h > 0 the knee is rounded over about h channels (u replaced by the softened ramp
    h log(1 + exp(u / h))), written from its definition."""
    c = np.arange(m, dtype=np.float64)
    if h > 0:
        u = h * (np.logaddexp(0.0, (knee - c) / h) + np.logaddexp(0.0, (c - (m - 1 - knee)) / h))
    else:
        u = np.maximum(0, knee - c) + np.maximum(0, c - (m - 1 - knee))
    return np.exp(-math.log(drop) * u / over)


def _plane(rng, n=1024, m=256, h=0.0):
    bp = knee_bandpass(m, h=h)
    gain = 1 + 0.03 * np.sin(np.arange(n) / 300.0)
    mu = gain[:, None] * bp[None, :]
    return mu, (rng.gamma(N_ACC, 1.0 / N_ACC, (n, m)) * mu).astype(np.float32)


def test_bandpass_follows_a_steep_knee():
    # Check value (the requirement): within 0.2 of a dump's noise sigma of the
    # analytic bandpass (knee_bandpass, written from its definition), at every channel,
    # knees and edges included.  The estimate's own noise (about 0.055 sigma per block:
    # the median of 512 dumps) is averaged down over the 14 blocks with a full window;
    # block_bandpass returns the shape, scaled to a median of 1 over the channels.
    rng = np.random.default_rng(1)
    m = 256
    bp_true = knee_bandpass(m)
    x = (rng.gamma(N_ACC, 1.0 / N_ACC, (4096, m)) * bp_true).astype(np.float32)
    bp, rows = block_bandpass(x, np.zeros(x.shape, bool), 0, 256)
    err = (bp[1:-1] / (bp_true / np.median(bp_true)) - 1).mean(axis=0)
    assert np.max(np.abs(err)) < 0.2 * SIGMA, np.max(np.abs(err)) / SIGMA


def test_one_sigma_carrier_on_the_knee_is_found():
    # Check value: a 1-sigma carrier in every dump is a sqrt(n)-sigma excess of an
    # n-dump mean (radiometer equation); on the knee's steep slope it must be found in
    # most of the dumps, and the clean knee channels not flagged.
    rng = np.random.default_rng(2)
    mu, x = _plane(rng)
    c = 14                                     # on the roll-off, 10 channels past the knee
    x[:, c] += (mu[:, c] * SIGMA).astype(np.float32)
    hit = sumthreshold_flagger(x, sigma=SIGMA, **L_BAND)
    assert hit[:, c].mean() > 0.9
    others = np.ones(x.shape[1], bool)
    others[c] = False
    assert hit[:, others].mean() < 0.003


def test_one_sigma_carrier_on_a_rounded_knee_is_found():
    # Check values: a carrier of 1 sigma per dump is 16 sigma in a 256-dump mean
    # (radiometer equation).  On a knee rounded over a channel (h = 1) straight lines
    # through three channels on either side miss the knee channel by 1.2 sigma and its
    # neighbour by 0.6 (the log of the ramp, computed from its definition), which hid
    # such a carrier (found in none of its dumps); the quadratics with a kink follow it
    # within 0.4 and 0.25 sigma.  A carrier on the knee channel (low edge) and one
    # channel outside the knee (high edge) must be found in most dumps (one product on
    # its own; 0.48-1.0 over seeds 7-12 on the rounded knee, the end blocks with half a
    # window the noisiest), and no other channel flagged, on this knee
    # and on a sharp one (h = 0), with one product at the shipped L-band
    # persist_sigma of 5 (config/bands/L.yaml).
    band = dict(L_BAND, persist_sigma=5.0)
    for h in (1.0, 0.0):                       # the rounded knee, then the sharp one
        m = 256
        mu, x = _plane(np.random.default_rng(7), n=2048, m=m, h=h)
        clean = sumthreshold_flagger(x, sigma=SIGMA, **band)
        assert clean.mean() < 0.003
        cs = [24, m - 1 - 24 + 1]
        for c in cs:
            x[:, c] += (mu[:, c] * SIGMA).astype(np.float32)
        hit = sumthreshold_flagger(x, sigma=SIGMA, **band)
        for c in cs:
            assert hit[:, c].mean() > 0.6, (h, c)
        others = np.ones(m, bool)
        others[cs] = False
        assert hit[:, others].mean() < 0.003


def test_an_emitter_beside_an_excluded_range_stands_out_of_the_baseline():
    # Check value: a 1.5-sigma emitter in every dump is 24 sigma in a 256-dump block mean
    # (radiometer equation); the bandpass quartile holds it, so the persistence test
    # must find it against the running median over channels.  Beside it lie 80
    # channels excluded in every dump (a known-bad range) and, beyond them, a 5 %
    # shoulder.  The excluded channels' bandpass is the interpolation between the
    # shoulder and the emitter, both lifted, so when the median ran over them it was
    # lifted to the emitter and found 0.04 of it (seeds 31, 32); the median over the
    # channels that hold data finds most of it (0.72-0.77).
    rng = np.random.default_rng(31)
    mu, x = _plane(rng, n=2048, m=512)
    ex = np.zeros(x.shape, bool)
    ex[:, 150:230] = True
    x[:, 230:256] += (mu[:, 230:256] * 1.5 * SIGMA).astype(np.float32)
    x[:, 70:150] *= np.float32(1.05)
    bp, rows = block_bandpass(x, ex, 0, 256)
    hit = persistent_flags(x, ex, ex, bp, rows, 0, SIGMA, (256, 128, 64), 64, 5.0)
    assert hit[:, 230:256].mean() > 0.6
    assert not hit[:, 150:230].any()
    assert hit[:, 300:].mean() < 0.003


def test_protected_range_is_honoured():
    # A smooth steady line (Gaussian, FWHM 14 channels, 1.2 sigma: the 21-cm line of the
    # issue) is flagged by the persistence test unless its channels are protected.
    rng = np.random.default_rng(3)
    mu, x = _plane(rng)
    c = np.arange(x.shape[1])
    line = 1.2 * np.exp(-0.5 * ((c - 128) / (14 / 2.3548)) ** 2)
    x += (mu * SIGMA * line[None, :]).astype(np.float32)
    on = line > 0.12
    hit = sumthreshold_flagger(x, sigma=SIGMA, **L_BAND)
    assert hit[:, on].mean() > 0.3
    protect = np.zeros(x.shape[1], bool)
    protect[100:157] = True
    hit = sumthreshold_flagger(x, sigma=SIGMA, protect=protect, **L_BAND)
    assert hit[:, on].mean() < 0.005


def test_a_shoulder_of_the_band_is_not_taken_for_an_emitter_at_low_noise():
    # Check values: the false-alarm budget, 0.3 % of clean samples; a
    # 1-sigma emitter is 16 sigma in a 256-dump mean (radiometer equation).  With
    # N = 8192 accumulations a dump's noise is 1.1 %, a 256-dump mean's 0.07 %.  A
    # 30 % shoulder (a logistic step over about 3 channels) on a 10 % slope pulled the
    # running median over 129 channels by up to 1 % on its upper side (the window
    # reaches the lower level), so the channels before it stood many sigma out: 7.6 %
    # of this plane was flagged.  Parted at the step, the median follows each side,
    # and an emitter 20 channels wide beside the step is still found.
    n_acc = 8192
    sig = 1 / math.sqrt(n_acc)
    rng = np.random.default_rng(41)
    n, m = 2048, 512
    c = np.arange(m)
    bp = (1 + 0.1 * c / m) * (1 - 0.3 / (1 + np.exp(-(c - 300) / 1.5)))
    mu = np.broadcast_to(bp[None, :], (n, m))
    x = (rng.gamma(n_acc, 1.0 / n_acc, (n, m)) * mu).astype(np.float32)
    ex = np.zeros(x.shape, bool)
    bpe, rows = block_bandpass(x, ex, 0, 256)
    hit = persistent_flags(x, ex, ex, bpe, rows, 0, sig, (256, 128, 64), 64, 5.0)
    assert hit.mean() < 0.003
    x[:, 240:260] += (mu[:, 240:260] * 1.0 * sig).astype(np.float32)
    bpe, rows = block_bandpass(x, ex, 0, 256)
    hit = persistent_flags(x, ex, ex, bpe, rows, 0, sig, (256, 128, 64), 64, 5.0)
    assert hit[:, 240:260].mean() > 0.9
    assert hit[:, 262:].mean() < 0.003


def test_persistence_test_finds_a_wide_block_absorbed_by_the_median():
    # An emitter 30 channels wide in every dump is held by the bandpass quartile (so
    # SumThreshold alone cannot see it) and must be found by the persistence test.
    rng = np.random.default_rng(4)
    mu, x = _plane(rng)
    x[:, 100:130] += (mu[:, 100:130] * 1.5 * SIGMA).astype(np.float32)
    ex = np.zeros(x.shape, bool)
    bp, rows = block_bandpass(x, ex, 0, 256)
    hit = persistent_flags(x, ex, ex, bp, rows, 0, SIGMA, block_lengths(256, 256), 64, 6.0)
    assert hit[:, 100:130].mean() > 0.95
    assert hit[:, :100].mean() < 0.003


def test_persistence_test_finds_an_emitter_across_an_aligned_block_boundary():
    # Check value: an n-dump mean of an e-sigma excess is e sqrt(n) sigma (radiometer
    # equation).  A 1.2-sigma emitter on for 64 dumps from dump 1120 puts 32 dumps in
    # each of the aligned 64-dump blocks (0.6 x 8 = 4.8 sigma each, under z = 6), and
    # all 64 in the block half a block later (9.6 sigma, over z plus the roughness
    # term, 1 to 2 here): the shifted blocks must find it, and nothing else.  Most of
    # it, not all: the run's end parts are cut at the change point of a 1.2-sigma step
    # in each channel on its own, which falls a few dumps inside (Hinkley 1970,
    # Biometrika 57, 1), and channels at the noise's low end stay under the threshold.
    rng = np.random.default_rng(13)
    mu, x = _plane(rng, n=2048, m=512)
    on = slice(1120, 1184)
    x[on, 100:120] += (mu[on, 100:120] * 1.2 * SIGMA).astype(np.float32)
    ex = np.zeros(x.shape, bool)
    bp, rows = block_bandpass(x, ex, 0, 256)
    hit = persistent_flags(x, ex, ex, bp, rows, 0, SIGMA, (64,), 64, 6.0)
    assert hit[on, 100:120].mean() > 0.7
    assert hit[:, :95].mean() < 0.003 and hit[:1100].mean() < 0.003


def test_an_off_part_flagged_alone_must_stand_out_by_two_sigma():
    # Check value: a part of 16 dumps of pure noise has a unit-variance z, so it passes
    # PART_SIGMA = 1 with probability norm.sf(1) = 0.159 and ISOLATED_PART_SIGMA = 2
    # with norm.sf(2) = 0.023 (scipy.stats).  An emitter at 2 sigma on for the first
    # 32 dumps of eight 64-dump sub-blocks (20 channels each) makes those sub-blocks
    # stand out (2 x 32 / 64 x 8 = 8 sigma); their last part is off.  Flagged alone
    # it must pass 2 sigma; flagged with the off part before it (both pass 1 sigma:
    # 0.159**2 = 0.025) the run's end is cut at the change point.  So at most about
    # 0.023 + 0.025 of those parts stay flagged; without the rule 0.12-0.20 were (three
    # seeds), and the on-dumps are found as before.
    rng = np.random.default_rng(21)
    mu, x = _plane(rng, n=2048, m=512)
    on = np.zeros(2048, bool)
    last = np.zeros(2048, bool)
    for j in range(8):
        on[64 * (4 * j + 1):64 * (4 * j + 1) + 32] = True
        last[64 * (4 * j + 1) + 48:64 * (4 * j + 2)] = True
    x[on, 100:120] += (mu[on, 100:120] * 2.0 * SIGMA).astype(np.float32)
    ex = np.zeros(x.shape, bool)
    bp, rows = block_bandpass(x, ex, 0, 256)
    hit = persistent_flags(x, ex, ex, bp, rows, 0, SIGMA, (256, 128, 64), 64, 5.0)
    assert hit[on, 100:120].mean() > 0.9
    assert hit[last, 100:120].mean() < 0.07


def test_an_emitter_coming_on_just_before_a_bandpass_block_boundary_is_found_from_its_start():
    # Check value: an n-dump mean of an e-sigma excess is e sqrt(n) sigma (radiometer
    # equation).  A 1.3-sigma emitter comes on 35 dumps before the bandpass-block
    # boundary at dump 1280 (T = 256).  The aligned 64-dump block before it holds 35 of
    # its dumps (1.3 x 35 / 64 x 8 = 5.7 sigma, under z = 5 plus the roughness term);
    # the block half a block later spans the boundary, and tested as its two aligned
    # halves, each against its own bandpass block, holds 64 (10.4 sigma).  Its first
    # dumps before the boundary must be found: 0.96-1.00 over seeds 23-25, where the
    # shifted blocks that span a boundary were left untested before (0.35 at seed 23).
    rng = np.random.default_rng(23)
    mu, x = _plane(rng, n=2048, m=512)
    x[1245:1500, 100:120] += (mu[1245:1500, 100:120] * 1.3 * SIGMA).astype(np.float32)
    ex = np.zeros(x.shape, bool)
    bp, rows = block_bandpass(x, ex, 0, 256)
    hit = persistent_flags(x, ex, ex, bp, rows, 0, SIGMA, (256, 128, 64), 64, 5.0)
    assert hit[1248:1280, 100:120].mean() > 0.7
    assert hit[:1200].mean() < 0.003


def test_chunks_anywhere_exact_with_the_new_stages():
    # With the halo of sumthreshold_halo, one sigma and t0, a chunk gives the whole
    # plane's result (the chunk-invariance contract of the engine).
    rng = np.random.default_rng(5)
    mu, x = _plane(rng, n=3000, m=128)
    x[500:1400, 40:60] += (mu[500:1400, 40:60] * 1.5 * SIGMA).astype(np.float32)
    s = dict(L_BAND)
    h = sumthreshold_halo(s)
    whole = sumthreshold_flagger(x, sigma=SIGMA, **s)
    for a, b in ((0, 1000), (1000, 1777), (1777, 3000)):
        lo, hi = max(0, a - h), min(len(x), b + h)
        part = sumthreshold_flagger(x[lo:hi], sigma=SIGMA, t0=lo, **s)[a - lo:b - lo]
        assert np.array_equal(part, whole[a:b])
        # told which rows are wanted, the flagger runs all but the bandpass on fewer rows
        # (those within the rule's reach less the bandpass's), with the same result there
        part = sumthreshold_flagger(x[lo:hi], sigma=SIGMA, t0=lo, wanted=(a - lo, b - lo), **s)
        assert np.array_equal(part[a - lo:b - lo], whole[a:b])


def test_combining_two_polarizations_finds_a_carrier_neither_alone_passes():
    # Check value: for strengths s and 0.8 s in two products with independent noise,
    # the sum of the normalised residuals over sqrt(2) carries 1.8 s / sqrt(2) = 1.27 s
    # (sums of independent Gaussians; common practice).  Carriers of 64 dumps at
    # 0.5 sigma (0.4 in the second product) lie below chi_64 = 8 / 1.5**6 = 0.70
    # (Offringa et al. 2010 thresholds) by 1.6 window sigma alone (0.125 for 64 dumps)
    # and by 0.5 combined (0.64): each product alone finds under a fifth of them, the
    # pair several times more.
    from rfisieve.detect.sumthreshold import combined_flagger

    rng = np.random.default_rng(6)
    n, m = 512, 128
    truth = np.zeros((n, m), bool)
    planes = [rng.normal(1.0, SIGMA, (n, m)) for _ in range(2)]
    for i, c in enumerate(range(10, 120, 12)):
        truth[20 + 45 * i:84 + 45 * i, c] = True
    for x, strength in zip(planes, (1.0, 0.8)):
        x[truth] += 0.5 * strength * SIGMA
    planes = [x.astype(np.float32) for x in planes]
    s = dict(chi1=8.0, max_window_time=64, max_window_freq=32)
    alone = [sumthreshold_flagger(x, sigma=SIGMA, **s) for x in planes]
    both = combined_flagger(planes, [SIGMA, SIGMA], **s)
    found_alone = max(a[truth].mean() for a in alone)
    assert found_alone < 0.2
    assert min(b[truth].mean() for b in both) > 0.3
    assert both[0][truth].mean() > 3 * found_alone
    assert max(b[~truth].mean() for b in both) < 0.002


def test_a_pulse_one_product_finds_alone_is_flagged_in_both():
    # Check values: a pulse one dump long and three channels wide at 3 sigma sums to
    # 3 sqrt(3) = 5.2 box sigma in the first product and 0.8 of that, 4.2, in the
    # second (box sums of independent unit Gaussians, common practice): against the box
    # threshold 4.5 the first finds most pulses alone and the second fewer.  The pair's
    # sum carries (3 + 2.4) sqrt(3) / sqrt(2) = 6.6 box sigma, 2.1 sigma above the
    # threshold (found with probability norm.cdf(2.1) = 0.98, scipy.stats), so the
    # joint pass must flag in the second product the pulses the first found alone
    # (before 2026-12-03 it left them out of the pair's sum as already flagged, and
    # flagged none of them); clean samples away from the pulses stay under 0.2 %.
    from scipy.ndimage import binary_dilation

    from rfisieve.detect.sumthreshold import combined_flagger

    rng = np.random.default_rng(11)
    n, m = 512, 128
    truth = np.zeros((n, m), bool)
    for i in range(40):
        t, c = 10 + 12 * i, 8 + (i * 29) % 110
        truth[t, c:c + 3] = True
    planes = [rng.normal(1.0, SIGMA, (n, m)) for _ in range(2)]
    for x, strength in zip(planes, (1.0, 0.8)):
        x[truth] += 3.0 * strength * SIGMA
    planes = [x.astype(np.float32) for x in planes]
    s = dict(chi1=8.0, compact_sigma=4.5)
    alone = [sumthreshold_flagger(x, sigma=SIGMA, **s) for x in planes]
    both = combined_flagger(planes, [SIGMA, SIGMA], **s)
    first_only = truth & alone[0] & ~alone[1]
    assert first_only.sum() >= 30
    assert both[1][first_only].mean() > 0.9
    far = ~binary_dilation(truth, np.ones((3, 5), bool))
    for a, b in zip(alone, both):
        assert not (a & ~b).any()                 # a product's own detections are kept
        assert b[truth].mean() > 0.9
        assert b[far].mean() < 0.002


def test_column_quantiles_match_numpy():
    # Brute force from the definition: numpy.quantile (linear interpolation between
    # order statistics, its default) per channel over the rows not excluded.
    from rfisieve.detect import _bandpass_kernels as k

    rng = np.random.default_rng(7)
    for n in (1, 2, 5, 64, 65):
        x = rng.normal(size=(n, 9)).astype(np.float32)
        ex = rng.random((n, 9)) < 0.3
        ex[:, 0] = True                       # a channel with no sample: NaN
        for q in (0.0, 0.25, 0.5, 0.9, 1.0):
            out = np.empty(9)
            k.column_quantiles(x, ex, 0, n, q, out, np.empty((9, n), np.float32))
            for c in range(9):
                v = x[~ex[:, c], c].astype(np.float64)
                want = np.quantile(v, q) if v.size else np.nan
                assert np.isclose(out[c], want, rtol=1e-6, atol=1e-6, equal_nan=True), (n, q, c)


def test_bandpass_not_absorbing_an_emitter_on_in_most_of_its_window():
    # An emitter of 3 sigma per dump on in 60 % of every 512-dump window (a satellite
    # pass).  Check value from the definition of a quantile (scipy.stats.norm, brentq):
    # the 1/4-quantile of the mixture 0.4 N(0, s) + 0.6 N(3, s) of 8-dump means
    # (s = 1 / sqrt(8)) lies 0.35 sigma above the clean channels' 1/4-quantile, where
    # the median of the same mixture lies 2.9 sigma above their median.
    from scipy.optimize import brentq
    from scipy.stats import norm

    s = 1 / math.sqrt(8)
    cdf = lambda v: 0.4 * norm.cdf(v / s) + 0.6 * norm.cdf((v - 3) / s)
    lift_q = brentq(lambda v: cdf(v) - 0.25, -3, 6) - norm.ppf(0.25) * s
    lift_med = brentq(lambda v: cdf(v) - 0.5, -3, 6)
    assert lift_q < 0.4 and lift_med > 2.5
    rng = np.random.default_rng(8)
    n, m = 4096, 128
    x = rng.normal(1.0, SIGMA, (n, m))
    on = (np.arange(n) % 512) < 307                # 60 % of every aligned 512 dumps
    x[np.ix_(on, np.arange(40, 56))] += 3 * SIGMA
    bp, _ = block_bandpass(x.astype(np.float32), np.zeros((n, m), bool), 0, 256)
    lift = (bp[2:-2, 40:56].mean(axis=1) / np.median(bp[2:-2, 70:], axis=1) - 1) / SIGMA
    assert np.all(lift < lift_q + 0.25), lift


def test_edge_flags_match_the_definition():
    # Brute force from the definition: a free sample above the threshold with a
    # detected sample at (t, c -+ 1) or (t -+ 1, c).
    from rfisieve.detect.bandpass import edge_flags

    rng = np.random.default_rng(9)
    g = rng.integers(-50, 50, (40, 30)).astype(np.int32)
    lev = (rng.random((40, 30)) < 0.1).astype(np.uint8)
    det = rng.random((40, 30)) < 0.15
    got = edge_flags(g, lev, det, 10.0, z=2.0)
    p = np.pad(det, 1)
    near = p[1:-1, :-2] | p[1:-1, 2:] | p[:-2, 1:-1] | p[2:, 1:-1]
    want = (lev == 0) & ~det & (g > 20) & near
    assert np.array_equal(got, want)
    # with ``done``: the samples tested are those not done; detections are neighbours
    done = det & (rng.random((40, 30)) < 0.5)
    got = edge_flags(g, lev, det, 10.0, z=2.0, done=done)
    assert np.array_equal(got, (lev == 0) & ~done & (g > 20) & near)


def test_a_pulse_edge_one_product_found_is_judged_by_the_pair():
    # Two-channel pulses with a weaker third channel: 6 and 2.5 sigma in the first
    # product, 4.8 and 4.0 in the second.  The second product's edge test (3 sigma next
    # to a detection) finds its third channel alone in most dumps; the first's alone
    # with probability norm.sf(0.5) = 0.31 (scipy.stats).  The pair's summed residual
    # at that channel is (2.5 + 4.0) / sqrt(2) = 4.6 sigma, above the edge threshold 3
    # with probability norm.cdf(1.6) = 0.945: the pair's edge test must flag the edge
    # in the first product too (before, it skipped a sample either product
    # had detected, and the first product kept 0.55 of its edges).
    from scipy.ndimage import binary_dilation

    from rfisieve.detect.sumthreshold import combined_flagger

    rng = np.random.default_rng(13)
    n, m = 512, 128
    body, edge = np.zeros((n, m), bool), np.zeros((n, m), bool)
    for i in range(40):
        t, c = 10 + 12 * i, 8 + (i * 29) % 110
        body[t, c:c + 2] = True
        edge[t, c + 2] = True
    planes = [rng.normal(1.0, SIGMA, (n, m)) for _ in range(2)]
    for x, (b, e) in zip(planes, ((6.0, 2.5), (4.8, 4.0))):
        x[body] += b * SIGMA
        x[edge] += e * SIGMA
    planes = [x.astype(np.float32) for x in planes]
    s = dict(chi1=8.0, compact_sigma=4.5)
    alone = [sumthreshold_flagger(x, sigma=SIGMA, **s) for x in planes]
    both = combined_flagger(planes, [SIGMA, SIGMA], **s)
    second_only = edge & alone[1] & ~alone[0]
    assert second_only.sum() >= 15
    assert both[0][second_only].mean() >= 0.85
    far = ~binary_dilation(body | edge, np.ones((3, 5), bool))
    for b in both:
        assert b[body].mean() > 0.95 and b[far].mean() < 0.002


def test_pulse_edge_left_by_sumthreshold_is_flagged():
    # A pulse one dump long and three channels wide at 5.5 sigma: SumThreshold
    # (chi_1 = 8, rho = 1.5: chi_2 = 5.33; Offringa et al. 2010) may find one pair of
    # it and leave the third channel; with the edge test every pulse is found whole,
    # and clean samples stay under the 0.3 % false-alarm budget of the issue.
    rng = np.random.default_rng(10)
    n, m = 1024, 256
    x = rng.normal(1.0, SIGMA, (n, m))
    truth = np.zeros((n, m), bool)
    for t in range(20, n - 20, 25):
        c = int(rng.integers(20, m - 23))
        truth[t, c:c + 3] = True
    x[truth] += 5.5 * SIGMA
    hit = sumthreshold_flagger(x.astype(np.float32), sigma=SIGMA, **L_BAND)
    assert hit[truth].mean() > 0.97
    assert hit[~truth].mean() < 0.003


def test_persistent_block_found_on_a_rippled_bandpass():
    # A standing-wave ripple of 3 % (period 23 channels, 30 noise sigma of a 256-dump
    # mean) and a 7-channel block at 5 sigma in every dump (held by the bandpass, so
    # only the persistence test can see it).  Check value: the ripple's robust scatter
    # is 1.4826 x MAD of A sin = 1.05 A (sin(pi/4) = 0.707; analytic), so the
    # threshold z + 3 s_r stays under the block's 80-sigma excess, while z s did not;
    # the ripple alone must not pass it (false alarms under the 0.3 %).
    rng = np.random.default_rng(11)
    n, m, acc = 1024, 256, 1024
    sig = 1 / math.sqrt(acc)
    c = np.arange(m)
    mu = knee_bandpass(m) * (1 + 0.03 * np.sin(2 * np.pi * c / 23.0))
    clean = (rng.gamma(acc, 1.0 / acc, (n, m)) * mu).astype(np.float32)
    hit = sumthreshold_flagger(clean, sigma=sig, **L_BAND)
    assert hit.mean() < 0.003
    x = clean.copy()
    x[:, 100:107] += (mu[100:107] * 5 * sig).astype(np.float32)
    hit = sumthreshold_flagger(x, sigma=sig, **L_BAND)
    assert hit[:, 100:107].mean() > 0.9
    others = np.ones(m, bool)
    others[99:108] = False
    assert hit[:, others].mean() < 0.003


def test_run_ends_follow_an_emitter_switching_mid_part():
    # A 20-channel emitter at 1.5 sigma per dump switching on and off at dumps that
    # are not part boundaries (parts of PART_DUMPS = 16).  Flagging whole end parts
    # costs on average half a part of off-dumps at each switch (a uniform switch
    # position; common practice); the change point of a step of 1.5 sigma is placed
    # within a few dumps (the log-likelihood ratio grows by d**2 / 2 = 1.1 per dump
    # per channel; Hinkley 1970).  So: the emitter is found (> 0.95), and under 15 %
    # of the 16 off-dumps beside each switch are flagged (whole end parts: 25 % here).
    rng = np.random.default_rng(12)
    mu, x = _plane(rng, n=2048, m=256)
    on = np.zeros(2048, bool)
    for a, b in ((105, 390), (531, 700), (903, 1250), (1411, 1800)):
        on[a:b] = True
    band = slice(100, 120)
    x[on, band] += (mu[on, band] * 1.5 * SIGMA).astype(np.float32)
    hit = sumthreshold_flagger(x, sigma=SIGMA, **L_BAND)
    assert hit[on, band].mean() > 0.95
    beside = np.zeros(2048, bool)
    for a, b in ((105, 390), (531, 700), (903, 1250), (1411, 1800)):
        beside[a - 16:a] = beside[b:b + 16] = True
    assert hit[beside, band].mean() < 0.15, hit[beside, band].mean()


def test_crowded_emitters_held_by_the_bandpass_are_found():
    # Two emitters of 40 and 30 channels at 1.5 sigma in every dump (held by the
    # bandpass, so only the persistence test sees them), 10 channels apart: 70 of the
    # 129 channels of the running median's window are lifted, and a median ignores
    # only under half of its window (from its definition), so one pass takes them
    # into the baseline.  With the channels found replaced by their neighbours'
    # interpolation and the median taken again, both are found.
    rng = np.random.default_rng(13)
    mu, x = _plane(rng, n=1024, m=512)
    a, c = slice(200, 240), slice(250, 280)
    x[:, a] += (mu[:, a] * 1.5 * SIGMA).astype(np.float32)
    x[:, c] += (mu[:, c] * 1.5 * SIGMA).astype(np.float32)
    hit = sumthreshold_flagger(x, sigma=SIGMA, **L_BAND)
    assert hit[:, a].mean() > 0.95 and hit[:, c].mean() > 0.95
    clean = np.ones(512, bool)
    clean[195:285] = False
    assert hit[:, clean].mean() < 0.003


def test_shifted_blocks_at_L_equal_T_are_left_out_wherever_the_plane_starts(monkeypatch):
    # Check value: the rule of persistence_test (its docstring and design notes 4.2a):
    # at L = T every shifted block spans two bandpass blocks and is left out.  The rule
    # must be one of L and T alone: deciding it from the plane (is any shifted block of
    # the plane inside one bandpass block?) kept the partial blocks at a plane's start
    # when it starts in the first half of a bandpass block (a scan's first chunk), and
    # then tested every shifted block of L = T of that plane, so a sample's flags
    # depended on where its chunk started (found on a simulated L-band scan: chunks of
    # 700 dumps against one of 4000 differed in 311 samples).
    from rfisieve.detect import bandpass

    tested = []
    straddling = bandpass._straddling

    def spy(b0, products, k, shift, *rest):
        tested.append(k * b0.S)
        return straddling(b0, products, k, shift, *rest)

    monkeypatch.setattr(bandpass, "_straddling", spy)
    rng = np.random.default_rng(8)
    _, x = _plane(rng, n=1200, m=128)
    for t0 in (0, 100, 200, 300):
        sumthreshold_flagger(x, sigma=SIGMA, t0=t0, **L_BAND)
    assert tested and max(tested) < L_BAND["bandpass_dumps"]


def test_reference_of_is_the_median_shape():
    # From the definition (reference_of): the per-channel median of the windows' shapes,
    # scaled to a median of 1 over the channels; numpy's median is the check.
    from rfisieve.detect.bandpass import reference_of

    rng = np.random.default_rng(5)
    shapes = [rng.uniform(0.5, 2.0, 64) for _ in range(5)]
    want = np.median(np.stack(shapes), axis=0)
    want /= np.median(want)
    np.testing.assert_allclose(reference_of(shapes + [None]), want, rtol=1e-12)
    assert reference_of([None]) is None


def test_reference_finds_a_wideband_block_a_standing_wave_hides():
    # A standing wave of 2 % with a period of 5 channels (a long reflection path) is a
    # roughness of about 2 % / (sigma / 16) = 11 noise sigma of a 256-dump block mean
    # (radiometer equation: sigma = 1 / sqrt(N)), which raises the spectral test's
    # threshold to about 6 + 3 x 11 = 39 sigma; a 24-channel noise-like emitter at 1.5
    # sigma per dump (the wideband transmitter) that fills the bandpass blocks
    # of dumps 512-1280 stands out of its block means by 1.5 x 16 = 24 sigma only.  Over
    # the scan's reference shape (windows where it is off) the standing wave divides out
    # and the emitter is found; the clean channels stay under the 0.3 %.
    from rfisieve.detect.bandpass import reference_of, reference_shape

    rng = np.random.default_rng(12)
    n, m, acc = 2048, 256, 1024
    sig = 1 / math.sqrt(acc)
    c = np.arange(m)
    mu = knee_bandpass(m) * (1 + 0.02 * np.sin(2 * np.pi * c / 5.0 + 0.3))
    x = (rng.gamma(acc, 1.0 / acc, (n, m)) * mu).astype(np.float32)
    on = slice(512, 1280)
    cols = slice(100, 124)
    x[on, cols] += (mu[cols] * 1.5 * sig * rng.gamma(acc, 1.0 / acc, (768, 24))).astype(np.float32)
    ex = np.zeros(x.shape, bool)
    ref = reference_of([reference_shape(x[a:a + 256], ex[a:a + 256]) for a in (0, 1536, 1792)])
    blind = sumthreshold_flagger(x, sigma=sig, **L_BAND)
    seen = sumthreshold_flagger(x, sigma=sig, reference=ref, **L_BAND)
    inside = (slice(768, 1024), cols)          # a bandpass block the emitter fills
    assert blind[inside].mean() < 0.5
    assert seen[inside].mean() > 0.9
    clean = np.ones(x.shape, bool)
    clean[on, 96:128] = False
    assert seen[clean].mean() < 0.003


def test_fine_test_spares_channels_beside_a_held_wide_emitter():
    # Check value from the fine test's own prediction (fine_excess: p(c) = (6 s_1 + 3 s_2
    # - 2 s_3) / 7 from the pairs' means s_j, exact for cubics): a flat log bandpass with
    # a 25-channel block raised by D = 0.5 starting three channels past c gives
    # s_3 = D / 2, so c stands (2 / 7)(D / 2) = D / 7 = 0.071 above its prediction, ~20
    # times the scatter of a bandpass quartile at N = 512 (0.06 sigma of a dump, 1 / sqrt(512)
    # each): a clean channel flagged.  With the block's channels held (the persistence
    # test's candidates) they are replaced as neighbours from the start and c is spared;
    # the block's own edges, found with every neighbour as measured, are still found.
    from rfisieve.detect.bandpass import fine_excess

    rng = np.random.default_rng(12)
    m, a, b = 256, 120, 145
    lb = rng.normal(0.0, 0.06 * SIGMA, m)
    lb[a:b] += 0.5
    row = np.exp(lb)
    held = np.zeros(m, bool)
    held[a:b] = True
    plain = fine_excess(row, 5.0)
    spared = fine_excess(row, 5.0, held=held)
    assert plain[a - 3] and plain[b + 2]          # the artefact: 3 channels out on each side
    assert not spared[a - 3] and not spared[b + 2]
    assert not spared[~held].any()
    assert spared[a] or spared[b - 1]             # an edge of the block itself


def test_bandpass_ignores_a_pulse_train_faster_than_its_groups():
    # Check value: numpy.quantile of the channel's dumps without the pulses (the
    # bandpass is that lower quartile, up to its noise of 1.36 / sqrt(2 T) of a dump,
    # Serfling 1980, 2.3.3).  A radar pulsing one dump in six puts a pulse in every
    # aligned group of 8 dumps whose means the quantile is taken over; each group's
    # mean is now taken without its largest dump, so a pulse in a group does not lift
    # it (before 2026-12-03 the channel's bandpass rose by 1/8 of a pulse: 19 % here,
    # and the fine test took the channel for a carrier).
    rng = np.random.default_rng(13)
    n, m, c = 1024, 64, 30
    x = rng.gamma(N_ACC, 1.0 / N_ACC, (n, m)).astype(np.float32)
    pulses = np.arange(n) % 6 == 0
    x[pulses, c] *= 2.5
    bp, _ = block_bandpass(x, np.zeros(x.shape, bool), 0, 256)
    want = np.quantile(x[~pulses, c], 0.25) / np.median(np.quantile(x, 0.25, axis=0))
    got = bp[1:-1, c].mean()
    assert abs(got / want - 1) < 0.5 * SIGMA, (got, want)

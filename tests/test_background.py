"""Tests of the masked background fit and the robust noise estimate."""

import numpy as np
import pytest
import scipy.stats

from rfisieve.detect.background import (box_radii, box_reach, fit_background, masked_smooth,
                                 robust_sigma)


def brute_smooth(x, exclude, sigma_t, sigma_f):
    """Normalised convolution B = S(w x) / S(w) straight from the definition,
    with S the repeated zero-padded box sums of box_radii, by np.convolve."""
    w = (~exclude).astype(np.float64)
    num = np.where(exclude, 0.0, x).astype(np.float64)
    den = w.copy()
    for axis, sigma in ((0, sigma_t), (1, sigma_f)):
        for r in box_radii(sigma):
            k = np.ones(2 * r + 1)
            num = np.apply_along_axis(np.convolve, axis, num, k, mode="same")
            den = np.apply_along_axis(np.convolve, axis, den, k, mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        return num / den, den


def test_box_radii_variance():
    # Kovesi 2010 (Proc. DICTA): box widths mixed so that the summed box
    # variances (w^2 - 1)/12 approach sigma^2.
    for sigma in (2.0, 5.0, 15.0, 40.0):
        r = box_radii(sigma)
        var = sum(((2 * k + 1) ** 2 - 1) / 12 for k in r)
        assert len(r) == 3
        assert abs(np.sqrt(var) - sigma) < 0.5
    assert box_radii(0) == ()
    assert box_reach(15.0) == sum(box_radii(15.0))


def test_equals_definition_with_holes():
    rng = np.random.default_rng(0)
    x = rng.random((60, 45)).astype(np.float32) + 1
    ex = rng.random(x.shape) < 0.3
    ex[20:30, 10:25] = True
    x[ex] = np.nan
    got = masked_smooth(x, ex, 3.0, 2.0, fill="nan", freq_order=0)
    want, den = brute_smooth(x, ex, 3.0, 2.0)
    ok = den > 0
    np.testing.assert_allclose(got[ok], want[ok], rtol=2e-6)
    assert np.all(np.isnan(got[~ok]))


def test_constant_with_holes():
    # A constant is returned exactly (normalised convolution, order zero), also
    # in regions with no valid sample (filled by interpolation).
    rng = np.random.default_rng(1)
    x = np.full((200, 120), 3.25, np.float32)
    ex = rng.random(x.shape) < 0.4
    ex[50:150, 30:90] = True           # wider than the kernel: no valid sample
    ex[170, :] = True
    x[ex] = np.nan
    b = fit_background(x, ex, sigma_t=5.0, sigma_f=3.0)
    np.testing.assert_allclose(b, 3.25, rtol=1e-6)


def test_linear_ramp_interior():
    # A linear ramp is returned exactly where the kernel is symmetric about the
    # sample (farther than the reach from the ends, no holes): the kernel is even.
    t = np.arange(300)[:, None]
    f = np.arange(100)[None, :]
    x = (2.0 + 0.01 * t + 0.03 * f).astype(np.float32)
    b = fit_background(x, sigma_t=10.0, sigma_f=4.0)
    rt, rf = box_reach(10.0), box_reach(4.0)
    np.testing.assert_allclose(b[rt:-rt, rf:-rf], x[rt:-rt, rf:-rf], rtol=1e-6)
    # holes placed symmetrically about the centre keep the centroid: exact too
    ex = np.zeros(x.shape, bool)
    ex[150 - 3, 50] = ex[150 + 3, 50] = True
    ex[150, 50 - 2] = ex[150, 50 + 2] = True
    b2 = fit_background(x, ex, sigma_t=10.0, sigma_f=4.0)
    assert b2[150, 50] == pytest.approx(x[150, 50], rel=1e-6)


def test_frequency_ramp_with_holes_and_edges():
    # freq_order=1 is a weighted least-squares straight line along frequency:
    # a bandpass ramp along frequency is returned exactly also next to holes and
    # at the band edges (a property of local linear regression).
    rng = np.random.default_rng(7)
    f = np.arange(150)[None, :]
    x = np.repeat((1.0 + 0.02 * f).astype(np.float32), 80, axis=0)
    ex = rng.random(x.shape) < 0.3
    ex[:, 60:75] = True
    x[ex] = np.nan
    b = fit_background(x, ex, sigma_t=6.0, sigma_f=5.0)
    want = np.repeat((1.0 + 0.02 * f), 80, axis=0)
    np.testing.assert_allclose(b, want, rtol=2e-6)


def test_flagged_values_do_not_leak():
    rng = np.random.default_rng(2)
    x = np.ones((128, 64), np.float32)
    ex = rng.random(x.shape) < 0.05
    x[ex] = 1e9
    x[10, 10] = np.inf                 # non-finite values are excluded always
    b = fit_background(x, ex)
    np.testing.assert_allclose(b, 1.0, rtol=1e-6)


def test_robust_sigma_matches_scipy():
    # scipy.stats.median_abs_deviation(scale="normal") is the reference.
    rng = np.random.default_rng(3)
    x = rng.standard_normal((50, 37)).astype(np.float32) * 2.5 + 1
    mask = rng.random(x.shape) < 0.2
    want = scipy.stats.median_abs_deviation(x[~mask].astype(np.float64), scale="normal")
    assert robust_sigma(x, mask) == pytest.approx(want, rel=1e-6)
    assert np.isnan(robust_sigma(x, np.ones(x.shape, bool)))


def test_robust_sigma_subsample_stable():
    # The subsampled MAD of unit Gaussian noise is 1 within its sampling error
    # (about 1.17/sqrt(2**18) = 0.23 %); halves of a plane agree to 1 %.
    rng = np.random.default_rng(4)
    x = rng.standard_normal((2048, 512)).astype(np.float32)
    x[rng.random(x.shape) < 0.01] = 50.0       # outliers hardly move it
    s = robust_sigma(x)
    assert s == pytest.approx(1.0, rel=0.015)
    s1 = robust_sigma(x[:300])
    assert s1 == pytest.approx(s, rel=0.01)


# ---------------------------------------------------------------- coarse-grid fit
from rfisieve.detect.background import cell_size, coarse_reach, coarse_smooth  # noqa: E402


def _sim_plane(rng, n=512, m=256, noise=0.01):
    """Bandpass times slow gain times relative Gaussian noise (radiometer
    equation), with line-shaped excluded regions as left by detections."""
    t = np.arange(n)[:, None]
    f = np.arange(m)[None, :]
    bp = (1.0 + 0.3 * np.sin(f / 40.0) + 0.2 * (f / m)) * (1.0 + 0.05 * np.sin(t / 150.0))
    x = (bp * (1.0 + noise * rng.standard_normal((n, m)))).astype(np.float32)
    ex = rng.random((n, m)) < 0.02
    ex[:, rng.integers(0, m, 8)] = True
    ex[rng.integers(0, n, 8), :] = True
    return x, ex


def test_coarse_cell_one_is_the_full_fit():
    # With cells of one sample the coarse fit is masked_smooth itself (same
    # moments, same kernel, same solve), up to float rounding.
    rng = np.random.default_rng(10)
    x, ex = _sim_plane(rng, 120, 70)
    x[ex] = np.nan
    got = coarse_smooth(x, ex, 6.0, 3.0, cell=(1, 1))
    want = masked_smooth(x, ex, 6.0, 3.0)
    np.testing.assert_allclose(got, want, rtol=1e-6)


def test_coarse_constant_with_holes():
    # Normalised convolution returns a constant exactly whatever is excluded
    # (also on the cell grid; gaps filled by interpolation).
    rng = np.random.default_rng(11)
    x = np.full((300, 120), 3.25, np.float32)
    ex = rng.random(x.shape) < 0.4
    ex[50:150, 30:90] = True
    ex[170, :] = True
    x[ex] = np.nan
    b = coarse_smooth(x, ex, 15.0, 5.0)
    np.testing.assert_allclose(b, 3.25, rtol=1e-6)


def test_coarse_frequency_ramp_with_holes_and_edges():
    # The cell moments are exact sums and the fit the same weighted
    # least-squares line (local linear regression): a ramp along frequency is
    # returned exactly next to holes and at the band edges (linear interpolation
    # and extrapolation of a line is the line).
    rng = np.random.default_rng(7)
    f = np.arange(150)[None, :]
    x = np.repeat((1.0 + 0.02 * f).astype(np.float32), 80, axis=0)
    ex = rng.random(x.shape) < 0.3
    ex[:, 60:75] = True
    x[ex] = np.nan
    b = fit_background(x, ex, sigma_t=15.0, sigma_f=5.0, coarse=True)
    want = np.repeat((1.0 + 0.02 * f), 80, axis=0)
    np.testing.assert_allclose(b, want, rtol=2e-6)


def test_coarse_plane_interior():
    # A plane in time and frequency is returned exactly away from the ends (even
    # kernel on the cells, bilinear interpolation reproduces a plane).
    t = np.arange(400)[:, None]
    f = np.arange(100)[None, :]
    x = (2.0 + 0.01 * t + 0.03 * f).astype(np.float32)
    b = coarse_smooth(x, np.zeros(x.shape, bool), 15.0, 5.0)
    rt = coarse_reach(15.0) + cell_size(15.0)
    np.testing.assert_allclose(b[rt:-rt], x[rt:-rt], rtol=1e-6)


def test_coarse_reach_bounds_the_influence():
    # coarse_reach is the halo rule's background term: a change at one sample
    # moves the background nowhere farther than that along either axis.
    x = np.ones((400, 64), np.float32)
    ex = np.zeros(x.shape, bool)
    b0 = coarse_smooth(x, ex, 15.0, 5.0)
    for t0 in range(200, 208):
        x2 = x.copy()
        x2[t0, 30] = 2.0
        moved = coarse_smooth(x2, ex, 15.0, 5.0) != b0
        rows = np.flatnonzero(moved.any(axis=1))
        cols = np.flatnonzero(moved.any(axis=0))
        assert rows.size and max(t0 - rows.min(), rows.max() - t0) <= coarse_reach(15.0)
        assert max(30 - cols.min(), cols.max() - 30) <= coarse_reach(5.0)


def test_coarse_fit_close_to_full_fit():
    # Accuracy of the approximation, in units of the per-sample noise: the full
    # fit's own noise is about 1/sqrt(4 pi sigma_t sigma_f) = 0.033 (effective
    # sample count of a 2-D Gaussian kernel, common practice); the coarse fit
    # must stay well inside it (measured: rms 0.012, max 0.054) so that it
    # raises no extra false alarms.
    rng = np.random.default_rng(12)
    x, ex = _sim_plane(rng)
    full = masked_smooth(x, ex, 15.0, 5.0)
    coarse = coarse_smooth(x, ex, 15.0, 5.0)
    d = (coarse / full - 1.0) / 0.01
    own = 1.0 / np.sqrt(4 * np.pi * 15.0 * 5.0)
    assert np.sqrt(np.mean(d ** 2)) < 0.5 * own
    assert np.abs(d).max() < 3 * own

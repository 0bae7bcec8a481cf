"""Tests of the spectral kurtosis detector (rfisieve.detect.kurtosis, rfisieve.detect.kurtosis_moments).

Every check value names its source.  Simulations draw Gaussian-noise powers as
Gamma(N d) variables (the mean of N raw powers of a complex, d = 1, or real, d = 1/2,
Gaussian voltage; Nita & Gary 2010, MNRAS 406, L60).
"""

from fractions import Fraction
import numpy as np
import pytest
from scipy import integrate, stats

from rfisieve.detect import kurtosis as sk
from rfisieve.detect.kurtosis_moments import sk_central_moments, sk_moments, sk_raw_moments


def _sim_sk(rng, m, k, trials):
    p = rng.standard_gamma(k, size=(trials, m))
    return sk.sk_estimator(p.sum(1), np.einsum("ij,ij->i", p, p), m, k, 1.0)


# --------------------------------------------------------------------------- estimator

def test_estimator_formula_by_hand():
    # Nita & Gary 2010, MNRAS 406, L60, eq. 8, evaluated by hand:
    # P = 1, 2, 3 -> S1 = 6, S2 = 14, M = 3, N = 2, d = 1:
    # SK = (6 + 1)/2 * (3 * 14 / 36 - 1) = 3.5 * (1/6) = 0.58333...
    assert sk.sk_estimator(6.0, 14.0, 3, 2, 1.0) == pytest.approx(3.5 / 6.0, rel=1e-14)
    # vectorised over M (blocks with fewer valid dumps); M < 2 gives NaN
    out = sk.sk_estimator([6.0, 6.0, 1.0], [14.0, 14.0, 1.0], np.array([3, 3, 1]), 2, 1.0)
    assert out[0] == out[1] and np.isnan(out[2])


# --------------------------------------------------------------------------- moments

@pytest.mark.parametrize("m", [2, 3, 8, 16, 300, 1000])
def test_mean_one_and_variance_nita_2007(m):
    # Nita et al. 2007, PASP 119, 805: E[SK] = 1, Var = 4 M^2 / ((M-1)(M+2)(M+3)), N = d = 1
    assert sk_raw_moments(m, 1, 1, 1)[1] == 1
    assert sk_central_moments(m, 1, 1, 2)[2] == Fraction(4 * m * m, (m - 1) * (m + 2) * (m + 3))


@pytest.mark.parametrize("m,n,d", [(8, 1, 0.5), (300, 10, 1.0), (16, 1024, 1.0), (5, 3, 0.5)])
def test_general_variance_closed_form(m, n, d):
    # Generalized variance 2 Nd (Nd + 1) M^2 Gamma(MNd + 2) / ((M - 1) Gamma(MNd + 4)):
    # the Nita & Gary 2010b (PASP 122, 595) form recalled from memory, with Gamma(MNd + 4)
    # in the denominator; that form reduces to Nita et al. 2007 at N = d = 1 (the recalled
    # Gamma(MNd + 5) does not).  Checked here against the exact algebra.
    # Gamma(x + 2) / Gamma(x + 4) = 1 / ((x + 2)(x + 3)): compare exactly, in Fractions.
    k = Fraction(n) * Fraction(d)
    mk = m * k
    closed = 2 * k * (k + 1) * m * m / ((m - 1) * (mk + 2) * (mk + 3))
    assert sk_central_moments(m, n, d, 2)[2] == closed
    assert float(closed) != pytest.approx(float(closed / (mk + 4)))  # the Gamma(MNd + 5) form


@pytest.mark.parametrize("k", [0.5, 1.0, 3.0])
def test_moments_against_quadrature_m2(k):
    # Brute force from the definition: for M = 2, P1 / S1 = B ~ Beta(k, k) and
    # SK = (2k + 1)(2 (B^2 + (1 - B)^2) - 1); integrate its moments numerically.
    beta = stats.beta(k, k)
    f = lambda b: (2 * k + 1) * (2 * (b * b + (1 - b) ** 2) - 1)  # noqa: E731
    mean = integrate.quad(lambda b: f(b) * beta.pdf(b), 0, 1, limit=200)[0]
    c = [integrate.quad(lambda b: (f(b) - mean) ** j * beta.pdf(b), 0, 1, limit=200)[0]
         for j in range(5)]
    got = sk_moments(2, k, 1.0)
    assert got[0] == pytest.approx(mean, abs=1e-9)
    assert got[1] == pytest.approx(c[2], rel=1e-8)
    assert got[2] == pytest.approx(c[3] / c[2] ** 1.5, abs=1e-7)
    assert got[3] == pytest.approx(c[4] / c[2] ** 2, rel=1e-7)


@pytest.mark.parametrize("m,k", [(4, 0.5), (16, 1.0), (8, 10.0)])
def test_moments_against_simulation(m, k):
    # Brute-force numpy simulation of Gamma(k) powers, loose tolerances (4e5 trials).
    rng = np.random.default_rng(20100601 + m)
    x = _sim_sk(rng, m, k, 400_000)
    mean, var, skew, kurt = sk_moments(m, k, 1.0)
    n = x.size
    assert abs(x.mean() - mean) < 5 * np.sqrt(var / n)
    assert x.var() == pytest.approx(var, rel=0.03)
    assert stats.skew(x) == pytest.approx(skew, abs=0.05 + 0.05 * abs(skew))
    assert stats.kurtosis(x, fisher=False) == pytest.approx(kurt, rel=0.1)


# --------------------------------------------------------------------------- thresholds

P3SIGMA = stats.norm.sf(3.0)  # 0.0013499, Nita & Gary 2010b, Table 1 ("3 sigma")


def test_table1_type3():
    # Nita & Gary 2010b, PASP 122, 595, Table 1: M = 300, N = 10, d = 1, PFA = 0.13499 %
    # per side, Pearson type III thresholds 0.76754 and 1.28212.
    lo, hi = sk.sk_thresholds(300, 10, 1.0, P3SIGMA, method="pearson3")
    assert lo == pytest.approx(0.76754, abs=5e-5)
    assert hi == pytest.approx(1.28212, abs=5e-5)


def test_table1_four_moment_fit():
    # Nita & Gary 2010b, Table 1 gives type VI thresholds 0.76648 and 1.28313 for the same
    # case.  With the EXACT four moments Pearson's kappa (ibid., eq. 17) is 0.82 < 1, i.e.
    # type IV, whose thresholds lie 3.5e-4 from the published type VI ones: the published
    # fit used a slightly different beta2.  Check the type and closeness (5e-4), not 5e-5.
    mean, var, skew, kurt = sk_moments(300, 10, 1.0)
    assert 0 < sk.pearson_kappa(skew, kurt) < 1
    lo, hi = sk.sk_thresholds(300, 10, 1.0, P3SIGMA, method="pearson")
    assert lo == pytest.approx(0.76648, abs=5e-4)
    assert hi == pytest.approx(1.28313, abs=5e-4)


def test_m2_exact_thresholds():
    # M = 2, N = d = 1: SK = 3 (2B - 1)^2 with B ~ U(0, 1) (brute force from the definition),
    # so P(SK <= s) = sqrt(s / 3) and the thresholds are 3 pfa^2 and 3 (1 - pfa)^2.
    lo, hi = sk.sk_thresholds(2, 1, 1.0, 1e-3)
    assert lo == pytest.approx(3e-6, rel=1e-8)
    assert hi == pytest.approx(3 * 0.999**2, rel=1e-10)


def test_threshold_arguments():
    assert sk.sk_thresholds(16, 64, 1.0, 1e-3, "auto") == sk.sk_thresholds(16, 64, 1.0, 1e-3, "exact")
    np.testing.assert_allclose(sk.sk_thresholds_sigma(16, 64, 1.0, 3.0), sk.sk_thresholds(16, 64, 1.0, P3SIGMA),
                               rtol=1e-12)
    with pytest.raises(ValueError):
        sk.sk_thresholds(16, 1, 1.0, 1e-3, "nonsense")
    with pytest.raises(ValueError):
        sk.sk_thresholds(1, 1, 1.0, 1e-3)
    with pytest.raises(ValueError):
        sk.sk_thresholds(16, 1, 1.0, 0.7)


@pytest.mark.parametrize("m,n,d,trials", [
    (8, 1, 0.5, 1_000_000),
    (8, 1, 1.0, 1_000_000),
    (16, 4, 0.5, 500_000),
    (64, 16, 1.0, 200_000),
    (300, 1, 1.0, 60_000),
])
def test_false_alarm_rate_default_method(m, n, d, trials):
    # The delivered rate of each tail must equal PFA within a 4-sigma binomial band
    # (simulated Gamma(N d) powers; the PFA is the definition of the thresholds).
    pfa = 1e-3 if trials >= 200_000 else 1e-2
    lo, hi = sk.sk_thresholds(m, n, d, pfa)
    rng = np.random.default_rng(1000 * m + n)
    x = _sim_sk(rng, m, n * d, trials)
    band = 4.0 * np.sqrt(trials * pfa * (1 - pfa))
    assert abs(np.count_nonzero(x < lo) - trials * pfa) < band
    assert abs(np.count_nonzero(x > hi) - trials * pfa) < band


# --------------------------------------------------------------------------- flagging

def test_flag_dumps_by_hand():
    # Mode (a), M = 3, N = d = 1: dump 0 raw powers 1, 2, 3 -> mean 2, S2 = 14,
    # SK = (3 + 1)/2 (3 * 14 / 36 - 1) = 1/3 (by hand, eq. 8 of Nita & Gary 2010);
    # dump 1 raw powers 2, 2, 2 -> SK = 0; dump 2 raw powers 0, 0, 6 -> SK = 2 * 2 = 4.
    power = np.array([[2.0], [2.0], [2.0]], dtype=np.float32)
    s2 = np.array([[14.0], [12.0], [36.0]], dtype=np.float32)
    f = sk.sk_flag_dumps(power, s2, 3, 1, 1.0, 0.2, 3.0)
    assert f[:, 0].tolist() == [False, True, True]
    f = sk.sk_flag_dumps(power * 3, s2, 3, 1, 1.0, 0.2, 3.0, power_is_sum=True)
    assert f[:, 0].tolist() == [False, True, True]
    f = sk.sk_flag_dumps(power, s2, 3, 1, 1.0, 0.2, 3.0, valid=np.array([[1], [0], [1]], bool))
    assert f[:, 0].tolist() == [False, False, True]


def test_flag_blocks_by_hand():
    # Mode (b), M = 4, step 4 (no overlap), N = 1, d = 1, thresholds set by hand so that
    # the outcome follows from eq. 8 of Nita & Gary 2010 computed by hand:
    # block [1, 1, 1, 1] -> SK = 0 (low: whole block flagged);
    # block [1, 2, 1, 2] -> S1 = 6, S2 = 10, SK = 5/3 (40/36 - 1) = 0.185 (passes 0.1..3);
    # block [1, 1, 1, 9] -> S1 = 12, S2 = 84, SK = 5/3 (336/144 - 1) = 2.22 > 2: flagged high;
    #   dropping the 9 leaves [1, 1, 1] with SK = 0 <= upper(3): only the 9 is flagged.
    col = np.array([1, 1, 1, 1, 1, 2, 1, 2, 1, 1, 1, 9], dtype=np.float32)[:, None]
    lo = np.full(5, 0.1)
    hi = np.full(5, 2.0)
    f = sk.sk_flag_blocks(col, None, 4, 1, 1.0, thresholds=(lo, hi), step=4, min_valid=3)
    assert f[:, 0].astype(int).tolist() == [1, 1, 1, 1, 0, 0, 0, 0, 0, 0, 0, 1]
    f = sk.sk_flag_blocks(col, None, 4, 1, 1.0, thresholds=(lo, hi), step=4, min_valid=3,
                          refine=False)
    assert f[:, 0].astype(int).tolist() == [1, 1, 1, 1, 0, 0, 0, 0, 1, 1, 1, 1]
    # a block with fewer than min_valid valid dumps is not tested
    valid = np.ones_like(col, dtype=bool)
    valid[0:2] = False
    f = sk.sk_flag_blocks(col, valid, 4, 1, 1.0, thresholds=(lo, hi), step=4, min_valid=3)
    assert f[:4, 0].tolist() == [False] * 4


def _noise_plane(rng, t, c, n):
    return (rng.standard_gamma(n, size=(t, c)) / n).astype(np.float32)


def test_invalid_samples_leave_other_results_unchanged():
    rng = np.random.default_rng(7)
    m, n = 16, 64
    power = _noise_plane(rng, 256, 12, n)
    power[40:44, 3] *= 6.0  # a pulse
    base = sk.sk_flag_blocks(power, None, m, n, 1.0, 1e-3)
    # invalidate samples of channel 5: channels other than 5 are unchanged, and junk values
    # under invalid samples do not matter
    valid = np.ones(power.shape, bool)
    valid[100:120, 5] = False
    junk = power.copy()
    junk[100:120, 5] = np.nan
    got = sk.sk_flag_blocks(junk, valid, m, n, 1.0, 1e-3)
    other = np.ones(power.shape[1], bool)
    other[5] = False
    assert np.array_equal(got[:, other], base[:, other])
    assert not got[100:120, 5].any()
    assert got[40:44, 3].all()
    s2 = (power.astype(np.float64) ** 2 * n * (1 + 1.0 / n)).astype(np.float32)
    d_base = sk.sk_flag_dumps(power, s2, n, 1, 1.0, 0.5, 1.5)
    d_got = sk.sk_flag_dumps(junk, s2, n, 1, 1.0, 0.5, 1.5, valid=valid)
    assert np.array_equal(d_got[:, other], d_base[:, other])


@pytest.mark.parametrize("split", [1, 37, 100, 129])
def test_block_flags_independent_of_chunking(split):
    rng = np.random.default_rng(11)
    m, n = 16, 32
    power = _noise_plane(rng, 300, 8, n)
    power[50:53, 2] *= 8.0
    power[120:180, 4] = 1.0  # a steady tone: low SK
    t_abs = 1000  # the plane starts at absolute dump 1000 of its scan
    full = sk.sk_flag_blocks(power, None, m, n, 1.0, 1e-3, t0=t_abs)
    h = sk.block_halo(m)
    a_end = min(split + h, power.shape[0])
    b_start = max(split - h, 0)
    part_a = sk.sk_flag_blocks(power[:a_end], None, m, n, 1.0, 1e-3, t0=t_abs)[:split]
    part_b = sk.sk_flag_blocks(power[b_start:], None, m, n, 1.0, 1e-3, t0=t_abs + b_start)
    glued = np.concatenate([part_a, part_b[split - b_start:]])
    assert np.array_equal(glued, full)
    assert full[50:53, 2].all() and full[120:180, 4].all()


def test_block_refinement_keeps_clean_data():
    # On pure noise the refined block flagger loses about as many clean dumps per channel
    # as the PFA implies (a few times 2 PFA), far fewer than whole-block flagging.
    rng = np.random.default_rng(3)
    m, n, pfa = 16, 64, 1e-3
    power = _noise_plane(rng, 4096, 64, n)
    refined = sk.sk_flag_blocks(power, None, m, n, 1.0, pfa).mean()
    whole = sk.sk_flag_blocks(power, None, m, n, 1.0, pfa, refine=False).mean()
    assert refined < whole
    assert refined < 10 * 2 * pfa


def test_gaussian_tail_equals_scipy():
    # reference: scipy.stats.norm.sf, the standard normal upper tail
    for sigma in (0.0, 1.0, 2.5, 3.0, 3.5, 4.0, 5.0, 6.5):
        assert sk.gaussian_tail(sigma) == pytest.approx(float(stats.norm.sf(sigma)), rel=1e-14)


def test_block_histogram_equals_numpy():
    # brute force from the definition (Nita & Gary 2010, MNRAS 406, L60, eq. 8) and
    # numpy.histogram, on gamma powers with invalid samples; blocks aligned to
    # multiples of M in absolute dumps, counted where they start inside ``rows``
    rng = np.random.default_rng(5)
    m, n, d, t0 = 8, 64, 1.0, 13
    power = rng.standard_gamma(n, size=(203, 17)).astype(np.float32) / n
    valid = rng.random(power.shape) > 0.01
    uniform = np.linspace(0.0, 3.0, 301)
    # uniform bins, and uniform bins followed by a geometric tail (the review's histogram)
    for edges, rows in [(uniform, (0, 203)), (uniform, (10, 150)), (uniform, (37, 38)), (uniform, (200, 203)),
                        (np.r_[np.linspace(0.0, 1.2, 121), 1.2 * 1.1 ** np.arange(1, 40)], (0, 203))]:
        sks = []
        for r in range(rows[0], rows[1]):
            if (t0 + r) % m or r + m > power.shape[0]:
                continue
            v = power[r:r + m].astype(np.float64)
            ok = valid[r:r + m].all(axis=0)
            s1, s2 = v.sum(axis=0), (v * v).sum(axis=0)
            ski = (m * n * d + 1.0) / (m - 1.0) * (m * s2 / (s1 * s1) - 1.0)
            sks.append(ski[ok])
        ski = np.concatenate(sks) if sks else np.empty(0)
        want, _ = np.histogram(np.clip(ski, edges[0], edges[-1] - 1e-9), edges)
        got = sk.sk_block_histogram(power, valid, m, n, d, edges, t0=t0, rows=rows)
        np.testing.assert_array_equal(got, want)

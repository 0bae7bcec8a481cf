"""Tests of the SIR operator."""

import numpy as np
from hypothesis import given, settings as hsettings, strategies as st
from hypothesis.extra import numpy as hnp

from rfisieve.detect.growth import sir_grow, sir_halo, sir_operator


def brute_sir(f, eta, reach=None):
    """Straight from the definition (Offringa, van de Gronde & Roerdink 2012,
    A&A 539, A95; docs/design.md 4): y is flagged when it lies in some interval
    [Y1, Y2) holding at least (1 - eta)(Y2 - Y1) flagged samples.  With
    ``reach`` = R (the project's bounded-reach variant, rfisieve.detect.growth) only
    intervals with Y1 >= y - R and Y2 <= y + 1 + R count."""
    n = len(f)
    out = np.zeros(n, bool)
    c = np.concatenate([[0], np.cumsum(f)])
    for y in range(n):
        lo = 0 if reach is None else max(0, y - reach)
        hi = n if reach is None else min(n, y + 1 + reach)
        for y1 in range(lo, y + 1):
            for y2 in range(y + 1, hi + 1):
                if c[y2] - c[y1] >= (1 - eta) * (y2 - y1) - 1e-9:
                    out[y] = True
                    break
            if out[y]:
                break
    return out


@hsettings(max_examples=200, deadline=None)
@given(hnp.arrays(np.bool_, st.integers(1, 30), elements=st.booleans()),
       st.sampled_from([0.0, 0.1, 0.2, 0.25, 0.3, 0.5, 0.7, 1.0]))
def test_sir_equals_definition(f, eta):
    np.testing.assert_array_equal(sir_operator(f, eta), brute_sir(f, eta))


def test_sir_2d_axes_and_grow():
    rng = np.random.default_rng(0)
    m = rng.random((25, 18)) < 0.3
    eta = 0.3
    t = sir_operator(m, eta, axis=0)
    f = sir_operator(m, eta, axis=1)
    for c in range(m.shape[1]):
        np.testing.assert_array_equal(t[:, c], brute_sir(m[:, c], eta))
    for r in range(m.shape[0]):
        np.testing.assert_array_equal(f[r], brute_sir(m[r], eta))
    # both directions on the input mask, OR-ed (documented choice)
    np.testing.assert_array_equal(sir_grow(m, eta), t | f)
    np.testing.assert_array_equal(sir_grow(m, eta, freq=False), t)


def test_sir_worked_example():
    # A run of 8 flagged samples with eta = 0.2 makes intervals of length up to
    # 8 / 0.8 = 10: growth by 2 samples in total, e.g. [Y1, Y2) = run plus one
    # sample each side (8 of 10 flagged); derived from the definition.
    f = np.zeros(20, bool)
    f[6:14] = True
    g = sir_operator(f, 0.2)
    assert g[4:16].all() and not g[:4].any() and not g[16:].any()


def test_sir_halo_rule():
    assert sir_halo(0.2, 8) == 10
    assert sir_halo(0.0, 100) == 0
    # chunked with the halo equals whole-line for runs no longer than L
    rng = np.random.default_rng(1)
    f = np.zeros(400, bool)
    for s in rng.integers(0, 390, 20):
        f[s:s + rng.integers(1, 9)] = True
    h = sir_halo(0.2, 8)
    whole = sir_operator(f, 0.2)
    a = sir_operator(f[:200 + h], 0.2)[:200]
    b = sir_operator(f[200 - h:], 0.2)[h:]
    assert (np.concatenate([a, b]) == whole).mean() > 0.99


# ---------------------------------------------------------------- bounded reach
@hsettings(max_examples=300, deadline=None)
@given(hnp.arrays(np.bool_, st.integers(1, 40), elements=st.booleans()),
       st.sampled_from([0.0, 0.1, 0.2, 0.25, 0.3, 0.5, 0.7, 1.0]),
       st.integers(0, 45))
def test_sir_reach_equals_definition(f, eta, reach):
    np.testing.assert_array_equal(sir_operator(f, eta, max_reach=reach), brute_sir(f, eta, reach))


@hsettings(max_examples=100, deadline=None)
@given(hnp.arrays(np.bool_, st.integers(30, 60), elements=st.booleans()),
       st.sampled_from([0.1, 0.2, 0.3]), st.sampled_from([1, 2, 4, 8]))
def test_sir_reach_sparse_runs(f, eta, reach):
    # sparser masks (runs and gaps, as from an intermittent emitter) exercise the
    # deques differently from dense random bits
    g = f.copy()
    g[::3] = False
    g[1::5] = False
    np.testing.assert_array_equal(sir_operator(g, eta, max_reach=reach), brute_sir(g, eta, reach))


def test_sir_reach_limits():
    rng = np.random.default_rng(2)
    f = rng.random(200) < 0.4
    # R = 0: only [y, y + 1): the input (from the definition)
    np.testing.assert_array_equal(sir_operator(f, 0.3, max_reach=0), f)
    # R >= the line length: the published operator
    np.testing.assert_array_equal(sir_operator(f, 0.3, max_reach=200), sir_operator(f, 0.3))
    np.testing.assert_array_equal(sir_operator(f, 0.3, max_reach=10 ** 6), sir_operator(f, 0.3))
    # the compiled kernel itself (the wrapper short-cuts R >= length to the published one)
    from rfisieve.detect import _growth_kernels as kernels_morph
    out = np.empty((1, 200), bool)
    kernels_morph.sir_rows_reach(f[None, :], 0.3, 250, out)
    np.testing.assert_array_equal(out[0], sir_operator(f, 0.3))
    # the reach only removes intervals: subset of the published operator, monotone in R
    prev = f
    for r in (1, 2, 4, 8, 16, 32):
        g = sir_operator(f, 0.3, max_reach=r)
        assert not (prev & ~g).any()
        assert not (g & ~sir_operator(f, 0.3)).any()
        prev = g


def test_sir_reach_growth_beside_long_run():
    # Isolated run of L flagged samples: the published operator grows
    # floor(eta L / (1 - eta)) per side; with reach R the growth per side is
    # min(that, floor(eta (R + 1))): for a clean sample g beyond the edge the best
    # interval is [y - R, y + 1), R + 1 - g flagged of R + 1 (derived from the
    # definition).  E.g. a 1600-dump pulse train at eta = 0.2 gains 400 dumps per
    # side unrestricted, 3 with R = 16.
    f = np.zeros(4000, bool)
    f[1000:2600] = True
    g = sir_operator(f, 0.2)
    assert g[600:3000].all() and not g[599] and not g[3000]
    g = sir_operator(f, 0.2, max_reach=16)
    assert g[997:2603].all() and not g[996] and not g[2603]
    for eta in (0.1, 0.2, 0.3):
        for r in (2, 4, 8, 16, 32):
            for n in (3, 10, 100):
                f = np.zeros(400, bool)
                f[100:100 + n] = True
                k = min(int(np.floor(eta * n / (1 - eta) + 1e-9)), int(np.floor(eta * (r + 1) + 1e-9)))
                g = sir_operator(f, eta, max_reach=r)
                assert g[100 - k:100 + n + k].all()
                assert not g[:100 - k].any() and not g[100 + n + k:].any()


def test_sir_reach_fills_gaps():
    # an intermittent emitter: runs of 6 on, 2 off; with eta = 0.25 an interval
    # covering a 2-gap and 3 flagged on each side has 6 of 8 flagged (from the
    # definition), so R = 4 fills every gap, as the published operator does
    f = np.zeros(100, bool)
    for s in range(20, 76, 8):
        f[s:s + 6] = True
    g = sir_operator(f, 0.25, max_reach=4)
    assert g[20:74].all()
    assert not (g[20:74] ^ sir_operator(f, 0.25)[20:74]).any()


def test_sir_reach_2d_and_grow():
    rng = np.random.default_rng(3)
    m = rng.random((30, 20)) < 0.3
    eta = 0.3
    t = sir_operator(m, eta, axis=0, max_reach=3)
    f = sir_operator(m, eta, axis=1, max_reach=2)
    for c in range(m.shape[1]):
        np.testing.assert_array_equal(t[:, c], brute_sir(m[:, c], eta, 3))
    for r in range(m.shape[0]):
        np.testing.assert_array_equal(f[r], brute_sir(m[r], eta, 2))
    np.testing.assert_array_equal(sir_grow(m, eta, reach_time=3, reach_freq=2), t | f)
    np.testing.assert_array_equal(sir_grow(m, eta, freq=False, reach_time=3), t)
    np.testing.assert_array_equal(sir_grow(m, eta, time=False, reach_freq=2), f)


def test_sir_reach_halo_exact():
    # with reach R every deciding interval lies in [y - R, y + 1 + R): a halo of
    # R dumps is exact for every mask; sir_halo returns R + 1 (one of margin)
    assert sir_halo(0.2, reach=16) == 17
    assert sir_halo(0.0, reach=16) == 0
    assert sir_halo(1.0, reach=4) == 5
    rng = np.random.default_rng(4)
    for eta in (0.1, 0.2, 0.5, 1.0):
        for r in (1, 4, 16):
            f = rng.random(500) < 0.5
            whole = sir_operator(f, eta, max_reach=r)
            for h in (r, sir_halo(eta, reach=r)):
                a = sir_operator(f[:250 + h], eta, max_reach=r)[:250]
                b = sir_operator(f[250 - h:], eta, max_reach=r)[h:]
                np.testing.assert_array_equal(np.concatenate([a, b]), whole)


def test_sir_reach_rejects_bad_reach():
    import pytest
    with pytest.raises(ValueError):
        sir_operator(np.zeros(5, bool), 0.2, max_reach=-1)
    with pytest.raises(ValueError):
        sir_operator(np.zeros(5, bool), 0.2, max_reach=2.5)


# ------------------------------------------------ fused kernel of sir_grow (both axes)
def _grow_by_definition(m, eta, rt, rf, time=True, freq=True):
    """sir_grow from brute_sir line by line: input | along time | along frequency."""
    out = m.copy()
    if time:
        for c in range(m.shape[1]):
            out[:, c] |= brute_sir(m[:, c], eta, rt)
    if freq:
        for r in range(m.shape[0]):
            out[r] |= brute_sir(m[r], eta, rf)
    return out


def _grow_by_operator(m, eta, rt, rf, time=True, freq=True):
    """sir_grow as composed from sir_operator (the per-line deque kernels)."""
    out = m.copy()
    if time:
        out |= sir_operator(m, eta, axis=0, max_reach=rt)
    if freq:
        out |= sir_operator(m, eta, axis=1, max_reach=rf)
    return out


@st.composite
def _run_masks(draw):
    """2-D masks built from runs (lengths 1 .. 40, along time or along channels),
    with scattered samples flipped: lines, bursts and gaps as in real flags."""
    n = draw(st.integers(1, 36))
    m = draw(st.integers(1, 36))
    runs = draw(st.lists(st.integers(1, 40), min_size=1, max_size=60))
    v = draw(st.booleans())
    flat = []
    for length in runs:
        flat.extend([v] * length)
        v = not v
    flat = (flat * (n * m // len(flat) + 1))[:n * m]
    f = np.array(flat, bool).reshape((n, m), order=draw(st.sampled_from("CF")))
    flips = draw(hnp.arrays(np.bool_, (n, m), elements=st.booleans()))
    if draw(st.booleans()):
        f ^= flips & draw(hnp.arrays(np.bool_, (n, m), elements=st.booleans()))
    return f


_reaches = st.one_of(st.none(), st.integers(0, 6), st.integers(0, 80))


@hsettings(max_examples=250, deadline=None)
@given(_run_masks(), st.integers(0, 1000).map(lambda i: i / 1000), _reaches, _reaches)
def test_sir_grow_fused_equals_definition(f, eta, rt, rf):
    # the fused kernel (rfisieve.detect._growth_kernels.sir_grow_reach with its candidate
    # skip) against the definition along each axis, OR-ed with the input
    np.testing.assert_array_equal(sir_grow(f, eta, reach_time=rt, reach_freq=rf),
                                  _grow_by_definition(f, eta, rt, rf))


@hsettings(max_examples=150, deadline=None)
@given(_run_masks(), st.floats(0.0, 1.0), _reaches, _reaches, st.booleans(), st.booleans())
def test_sir_grow_fused_bit_identical_to_operator(f, eta, rt, rf, time, freq):
    # any float eta (near-ties of the 1e-9 tolerance included): the same bits as
    # composing sir_operator, which the fused kernel replaces
    np.testing.assert_array_equal(sir_grow(f, eta, time=time, freq=freq, reach_time=rt, reach_freq=rf),
                                  _grow_by_operator(f, eta, rt, rf, time, freq))


def test_sir_grow_fused_planes():
    # larger planes: dense and sparse dumps (vectorised and one-by-one decisions),
    # lines, bursts and gaps; compared with sir_operator composed
    rng = np.random.default_rng(5)
    n, m = 150, 130
    f = rng.random((n, m)) < 0.01
    f[:, 7] = True                       # a channel flagged throughout
    f[40, :] = True                      # a whole dump
    for s in range(10, 140, 9):          # an intermittent emitter: 6 on, 3 off
        f[s:s + 6, 20] = True
    f[60:75, 50:54] = True               # a burst
    f[90:, 100:] = rng.random((60, 30)) < 0.5   # a dense corner
    for eta in (0.05, 0.1, 0.2, 0.3, 0.5, 0.9, 1.0):
        for rt, rf in ((16, 4), (1, 1), (8, 16), (64, 64), (65, 3), (0, 0), (None, 4), (16, None)):
            np.testing.assert_array_equal(sir_grow(f, eta, reach_time=rt, reach_freq=rf),
                                          _grow_by_operator(f, eta, rt, rf))


def test_sir_grow_tolerance_ties_and_skip_threshold():
    from rfisieve.detect.growth import _skip_threshold
    # eta = 0.1, R = 16: an interval of L samples needs ceil(0.9 L - 1e-9)
    # flagged ones; a clean sample needs L >= 10, so >= 9 flagged ones within 16
    # (from the definition); R = 4 adds nothing (floor(eta (R + 1)) = 0)
    assert _skip_threshold(0.1, 16, 2082) == 9
    assert _skip_threshold(0.1, 4, 1024) == -1
    assert _skip_threshold(0.0, 16, 100) == -1       # eta = 0: the input
    assert _skip_threshold(1.0, 3, 100) == 0         # eta = 1: everything
    # (1 - eta) L within the float64 error bound of an integer + 1e-9: no skip
    # (every clean sample is decided), results still those of sir_operator
    eta = 1.0 - (3.0 + 1e-9) / 4.0
    assert _skip_threshold(eta, 4, 50) == 0
    rng = np.random.default_rng(6)
    f = rng.random((40, 50)) < 0.6
    np.testing.assert_array_equal(sir_grow(f, eta, reach_time=4, reach_freq=4),
                                  _grow_by_operator(f, eta, 4, 4))


def test_sir_grow_input_forms():
    rng = np.random.default_rng(7)
    f = rng.random((60, 40)) < 0.3
    ref = _grow_by_operator(f, 0.2, 16, 4)
    # non-contiguous and non-bool inputs give the same result, C-contiguous bool out
    np.testing.assert_array_equal(sir_grow(np.asfortranarray(f), 0.2, reach_time=16, reach_freq=4), ref)
    g = sir_grow(f.T.copy().T, 0.2, reach_time=16, reach_freq=4)
    assert g.dtype == np.bool_ and g.flags.c_contiguous
    np.testing.assert_array_equal(g, ref)
    np.testing.assert_array_equal(sir_grow(f.astype(np.uint8) * 7, 0.2, reach_time=16, reach_freq=4), ref)
    v = f[::2, ::3]
    np.testing.assert_array_equal(sir_grow(v, 0.2, reach_time=16, reach_freq=4), _grow_by_operator(v, 0.2, 16, 4))
    # empty and 1-D masks
    for shape in ((0, 5), (5, 0), (0, 0)):
        assert sir_grow(np.zeros(shape, bool), 0.2, reach_time=16, reach_freq=4).shape == shape
    line = rng.random(30) < 0.4
    np.testing.assert_array_equal(sir_grow(line, 0.3, reach_time=2, reach_freq=5),
                                  line | sir_operator(line, 0.3, max_reach=2) | sir_operator(line, 0.3, max_reach=5))
    import pytest
    with pytest.raises(ValueError):
        sir_grow(f, 1.5, reach_time=16)
    with pytest.raises(ValueError):
        sir_grow(f, 0.2, reach_freq=-1)

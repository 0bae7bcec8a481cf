"""Tests of the SIR operator."""

import numpy as np
from hypothesis import given, settings as hsettings, strategies as st
from hypothesis.extra import numpy as hnp

from rfisieve.morphology import sir_grow, sir_halo, sir_operator


def brute_sir(f, eta):
    """Straight from the definition (Offringa, van de Gronde & Roerdink 2012,
    A&A 539, A95; DESIGN.md 3): y is flagged when it lies in some interval
    [Y1, Y2) holding at least (1 - eta)(Y2 - Y1) flagged samples."""
    n = len(f)
    out = np.zeros(n, bool)
    c = np.concatenate([[0], np.cumsum(f)])
    for y in range(n):
        for y1 in range(0, y + 1):
            for y2 in range(y + 1, n + 1):
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

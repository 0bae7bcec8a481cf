"""Exact random draws of dump powers and visibilities for the simulator.

Model (voltage level).  Each input of a group (one input for auto-only scans; the
antennas of one feed for scans with cross products) sees, in raw spectrum k of a dump,
the complex voltage

    v_k = s + n_k,     n_k ~ CN(0, Sigma_k)

with ``s`` the (constant) carrier voltage and ``Sigma_k = diag(mu) + R_k`` the noise
covariance: receiver + sky noise ``mu`` (independent between inputs) plus the
covariance ``R_k`` of noise-like interference (rank one per emitter, correlated between
antennas with the phase of its geometric delay).  A pulsed emitter adds its part of
``R_k`` only in ``n_p`` of the N raw spectra.  A dump records ``Q / N`` with
``Q = sum_k v_k v_k^H`` (autos on the diagonal, crosses off it).

Exact draw of Q for a segment of n raw spectra with constant ``s`` and ``Sigma``
(standard decomposition of a complex Gaussian sample into its mean and scatter):

    Q = n (s + m)(s + m)^H + C A C^H,   m ~ CN(0, Sigma / n),  A ~ CW_K(n - 1, I),

with ``C C^H = Sigma`` (Cholesky) and A independent of m, drawn by the Bartlett
decomposition ``A = L L^H``, ``|L_ii|^2 ~ Gamma(n - 1 - i)``, ``L_ij ~ CN(0, 1)``
(i > j).  For one input this is ``sigma^2 / 2`` times a noncentral chi-square with 2n
degrees of freedom and noncentrality ``2 n |s|^2 / sigma^2``, and without a carrier it
is ``sigma^2`` times a Gamma(n) variate: the radiometer equation's exact dump
statistics.  A dump with a pulse is the sum of two such segments.

Approximations (documented, rare): two carriers in the same sample are not summed
coherently; the weaker one enters as noise-like power (the mean is kept exact, the
shape of its distribution is not).  Pulses of two pulsed emitters in one dump are taken
as one pulse of the summed length carrying their summed energy (mean exact).  A segment
has at least K + 1 raw spectra (K inputs in the group); shorter pulses are stretched to
that length with the same energy.

Every sample first gets a draw from the *noise* stream that does not depend on the
interference, so two scans with the same seed are identical wherever no interference
was added; samples that need a different draw (all interfered samples of an auto-only
scan, pulsed samples of a scan with crosses) are redrawn from the *interference*
stream.
"""

import numpy as np


def complex_normal(rng, shape):
    """Standard circular complex normal CN(0, 1) draws."""
    z = rng.standard_normal(tuple(shape) + (2,))
    return (z[..., 0] + 1j * z[..., 1]) * np.sqrt(0.5)


def wishart_sum(rng, n, sigma, s=None):
    """Draw ``Q = sum_{k=1..n} v_k v_k^H`` for ``v_k ~ CN(s, sigma)`` i.i.d.

    Parameters
    ----------
    rng : numpy.random.Generator
    n : array_like of int, shape (M,)
        Raw spectra per sample; each >= K + 1.
    sigma : ndarray complex, shape (M, K, K)
        Hermitian positive-definite noise covariance per sample.
    s : ndarray complex, shape (M, K), optional
        Carrier voltage per sample.

    Returns
    -------
    ndarray complex128, shape (M, K, K)
    """
    sigma = np.asarray(sigma, dtype=np.complex128)
    m_count, k = sigma.shape[0], sigma.shape[-1]
    n = np.broadcast_to(np.asarray(n, dtype=np.float64), (m_count,))
    if m_count == 0:
        return np.zeros((0, k, k), dtype=np.complex128)
    if np.any(n < k + 1):
        raise ValueError("wishart_sum needs n >= K + 1 raw spectra")
    if k == 1:
        chol = np.sqrt(sigma.real)
    else:
        chol = np.linalg.cholesky(sigma)
    lower = np.zeros((m_count, k, k), dtype=np.complex128)
    for i in range(k):
        lower[:, i, i] = np.sqrt(rng.standard_gamma(n - 1.0 - i))
    rows, cols = np.tril_indices(k, -1)
    if rows.size:
        lower[:, rows, cols] = complex_normal(rng, (m_count, rows.size))
    z = complex_normal(rng, (m_count, k))
    ca = chol @ lower
    scatter = ca @ np.conj(np.swapaxes(ca, -1, -2))
    u = np.einsum("mij,mj->mi", chol, z) / np.sqrt(n)[:, None]
    if s is not None:
        u = u + s
    return n[:, None, None] * (u[:, :, None] * np.conj(u[:, None, :])) + scatter


class Group:
    """Per-sample interference state of a group of K inputs on a (T, F) grid."""

    def __init__(self, names, mu, accumulations):
        self.names = list(names)
        self.k = len(self.names)
        self.n = int(accumulations)
        self.mu = np.stack([mu[name] for name in self.names], axis=-1)        # (T,F,K)
        shape = self.mu.shape[:2]
        self.carrier = np.zeros(shape + (self.k,), dtype=np.complex128)       # s
        self.carrier_power = np.zeros(shape)
        self.extra = np.zeros(shape + (self.k, self.k), dtype=np.complex128)  # R (whole dump)
        self.energy = np.zeros(shape + (self.k, self.k), dtype=np.complex128)  # sum n_j R_j
        self.nsum = np.zeros(shape, dtype=np.int64)
        self.touched = np.zeros(shape, dtype=bool)
        self.npulse = None

    def add(self, pattern, freq, time, cross):
        """Add an emitter :class:`~rfisieve.sim.emitters.Pattern` to the state."""
        scales = np.array([pattern.scale.get(name, 0.0) for name in self.names])
        if not np.any(scales > 0):
            return
        ti, fi = pattern.support()
        if ti.size == 0:
            return
        inr = pattern.inr[ti, fi][:, None] * scales[None, :]                  # (S,K)
        power = inr * self.mu[ti, fi] / np.sqrt(self.n)
        amp = np.sqrt(power).astype(np.complex128)
        if cross and self.k > 1:
            t_rel = time[ti] - time[0]
            for j, name in enumerate(self.names):
                tau0, rate = pattern.delays[name[:-1]]
                amp[:, j] *= np.exp(-2j * np.pi * freq[fi] * (tau0 + rate * t_rel))
        outer = amp[:, :, None] * np.conj(amp[:, None, :])
        self.touched[ti, fi] = True
        if pattern.mode == "noise":
            self.extra[ti, fi] += outer
        elif pattern.mode == "pulse":
            self.energy[ti, fi] += self.n * outer
            self.nsum[ti, fi] += pattern.npulse[ti]
        else:  # carrier: keep the stronger one coherent, the weaker as noise-like power
            key = power.sum(axis=1)
            old = self.carrier[ti, fi]
            old_outer = old[:, :, None] * np.conj(old[:, None, :])
            stronger = key > self.carrier_power[ti, fi]
            self.extra[ti, fi] += np.where(stronger[:, None, None], old_outer, outer)
            self.carrier[ti, fi] = np.where(stronger[:, None], amp, old)
            self.carrier_power[ti, fi] = np.maximum(key, self.carrier_power[ti, fi])

    def finish(self):
        """Turn the summed pulse energy into (pulse length, pulse covariance)."""
        k, n = self.k, self.n
        npulse = np.where(self.nsum > 0, np.clip(self.nsum, k + 1, n), 0)
        fold = (npulse > 0) & (npulse > n - (k + 1))
        self.extra[fold] += self.energy[fold] / n
        npulse[fold] = 0
        self.npulse = npulse
        safe = np.where(npulse > 0, npulse, 1)
        self.pulse_extra = self.energy / safe[..., None, None]

    def base_sigma(self, index):
        sig = self.extra[index].copy()
        mu = self.mu[index]
        for i in range(self.k):
            sig[..., i, i] += mu[..., i]
        return sig


def draw_dumps(group, rng_noise, rng_rfi, cross, block_elems=1 << 21):
    """Draw the dumps ``Q / N`` of a finished :class:`Group`.

    Returns
    -------
    ndarray
        (T, F) float64 powers when K = 1 and not ``cross``; else (T, F, K, K) complex128.
    """
    n = group.n
    t_count, f_count = group.mu.shape[:2]
    if not cross:
        mu = group.mu[..., 0]
        out = mu * (rng_noise.standard_gamma(float(n), size=mu.shape) / n)
        ti, fi = np.nonzero(group.touched)
        if ti.size:
            out[ti, fi] = _draw_interfered(group, (ti, fi), rng_rfi)[:, 0, 0].real / n
        return out
    k = group.k
    out = np.empty((t_count, f_count, k, k), dtype=np.complex128)
    step = max(1, block_elems // max(f_count * k * k, 1))
    for a in range(0, t_count, step):
        b = min(a + step, t_count)
        tt, ff = np.meshgrid(np.arange(a, b), np.arange(f_count), indexing="ij")
        index = (tt.ravel(), ff.ravel())
        q = wishart_sum(rng_noise, np.full(index[0].size, n), group.base_sigma(index),
                        group.carrier[index])
        out[a:b] = (q / n).reshape(b - a, f_count, k, k)
    ti, fi = np.nonzero(group.npulse > 0)
    if ti.size:
        out[ti, fi] = _draw_interfered(group, (ti, fi), rng_rfi) / n
    return out


def _draw_interfered(group, index, rng):
    """Q for the given samples, with pulses as a second segment."""
    npulse = group.npulse[index]
    sig = group.base_sigma(index)
    s = group.carrier[index]
    q = np.empty(sig.shape, dtype=np.complex128)
    plain = npulse == 0
    if np.any(plain):
        q[plain] = wishart_sum(rng, np.full(int(plain.sum()), group.n), sig[plain], s[plain])
    hit = ~plain
    if np.any(hit):
        npl = npulse[hit]
        sig_p = sig[hit] + group.pulse_extra[index][hit]
        q[hit] = (wishart_sum(rng, group.n - npl, sig[hit], s[hit])
                  + wishart_sum(rng, npl, sig_p, s[hit]))
    return q


def draw_raw(group, rng_noise, rng_rfi, block_elems=1 << 23):
    """Simulate the raw powers of a one-input group explicitly; return (S1 / M, S2).

    Raw powers are ``|v_k|^2`` (exponential for pure noise); ``S1 = sum P_k`` and
    ``S2 = sum P_k^2`` over the M = accumulations raw spectra of each dump.
    """
    if group.k != 1:
        raise ValueError("raw-spectrum simulation is for auto-only scans")
    m = group.n
    mu = group.mu[..., 0]
    t_count, f_count = mu.shape
    mean = np.empty(mu.shape)
    s2 = np.empty(mu.shape)
    step = max(1, block_elems // max(f_count * m, 1))
    for a in range(0, t_count, step):
        b = min(a + step, t_count)
        e = rng_noise.standard_exponential((b - a, f_count, m), dtype=np.float32)
        mean[a:b] = mu[a:b] * e.sum(axis=-1, dtype=np.float64) / m
        np.square(e, out=e)
        s2[a:b] = mu[a:b] ** 2 * e.sum(axis=-1, dtype=np.float64)
    ti, fi = np.nonzero(group.touched)
    step = max(1, block_elems // max(m * 2, 1))
    for a in range(0, ti.size, step):
        idx = (ti[a:a + step], fi[a:a + step])
        base = mu[idx] + group.extra[idx][:, 0, 0].real
        level = np.repeat(base[:, None], m, axis=1)
        npl = group.npulse[idx]
        pulse = group.pulse_extra[idx][:, 0, 0].real
        k_index = np.arange(m)[None, :]
        level = level + np.where(k_index < npl[:, None], pulse[:, None], 0.0)
        noise = np.sqrt(level) * complex_normal(rng_rfi, level.shape)
        v = group.carrier[idx][:, 0][:, None] + noise
        p = v.real ** 2 + v.imag ** 2
        mean[idx] = p.mean(axis=1)
        s2[idx] = (p * p).sum(axis=1)
    return mean, s2

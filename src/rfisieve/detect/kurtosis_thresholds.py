"""Spectral-kurtosis thresholds: the distribution fits and the "exact" tails (theory
only; no files).  The public entry point is :func:`rfisieve.detect.kurtosis.sk_thresholds`
(with its disk cache, :mod:`rfisieve.detect.kurtosis_cache`); the methods and their
measured accuracy are described in :mod:`rfisieve.detect.kurtosis`.
"""

from functools import lru_cache

import numpy as np

class _LazyModule:
    """A scipy submodule imported on first use.  Flagging with thresholds from the disk
    cache never touches scipy, and importing it costs about a second per job."""

    def __init__(self, name):
        self._name = name

    def __getattr__(self, attr):
        import importlib

        return getattr(importlib.import_module(self._name), attr)


integrate, optimize, special, stats = (_LazyModule(f"scipy.{_m}") for _m in ("integrate", "optimize", "special", "stats"))

from rfisieve.detect.kurtosis_moments import (
    sk_moments,
)

#: Threshold methods accepted by :func:`rfisieve.detect.kurtosis.sk_thresholds`.
METHODS = ("auto", "exact", "pearson", "pearson3")


# ---------------------------------------------------------------------------
# Distribution fits
# ---------------------------------------------------------------------------

class _Scipy:
    """Tail quantiles of a frozen scipy distribution of SK, optionally mirrored (X = -Y)."""

    def __init__(self, dist, mirror=False, name=""):
        self.dist, self.mirror, self.name = dist, mirror, name

    def lower(self, p):
        return -self.dist.isf(p) if self.mirror else self.dist.ppf(p)

    def upper(self, p):
        return -self.dist.ppf(p) if self.mirror else self.dist.isf(p)

    def sf(self, x):
        return self.dist.cdf(-x) if self.mirror else self.dist.sf(x)

    def cdf(self, x):
        return self.dist.sf(-x) if self.mirror else self.dist.cdf(x)


class _Type4:
    """Pearson type IV: p(x) ~ (1 + z^2)^(-m) exp(-nu arctan z), z = (x - lam) / a."""

    name = "IV"

    def __init__(self, m, nu, a, lam):
        self.m, self.nu, self.a, self.lam = m, nu, a, lam
        self.zmode = -nu / (2.0 * m)
        self.umax = self._u(self.zmode)
        left = integrate.quad(self._f, -np.inf, self.zmode, epsabs=0, epsrel=1e-11, limit=200)[0]
        right = integrate.quad(self._f, self.zmode, np.inf, epsabs=0, epsrel=1e-11, limit=200)[0]
        self.left, self.right, self.norm = left, right, left + right

    def _u(self, z):
        return -self.m * np.log1p(z * z) - self.nu * np.arctan(z)

    def _f(self, z):
        return np.exp(self._u(z) - self.umax)

    def _sfz(self, z):
        if z >= self.zmode:
            return integrate.quad(self._f, z, np.inf, epsabs=0, epsrel=1e-11, limit=200)[0] / self.norm
        return 1.0 - self._cdfz(z)

    def _cdfz(self, z):
        if z <= self.zmode:
            return integrate.quad(self._f, -np.inf, z, epsabs=0, epsrel=1e-11, limit=200)[0] / self.norm
        return 1.0 - self._sfz(z)

    def sf(self, x):
        return self._sfz((x - self.lam) / self.a)

    def cdf(self, x):
        return self._cdfz((x - self.lam) / self.a)

    def _solve(self, func, p, direction):
        z0 = self.zmode
        step = 1.0
        z1 = z0 + direction * step
        while func(z1) > p:
            step *= 2.0
            z1 = z0 + direction * step
            if step > 1e12:
                raise ArithmeticError("Pearson IV tail root not bracketed")
        z = optimize.brentq(lambda z: np.log(func(z)) - np.log(p), min(z0, z1), max(z0, z1),
                            xtol=1e-13, rtol=1e-13, maxiter=200)
        return self.lam + self.a * z

    def lower(self, p):
        return self._solve(self._cdfz, p, -1.0)

    def upper(self, p):
        return self._solve(self._sfz, p, +1.0)


def _fit_pearson3(mean, var, skew):
    """Pearson type III (shifted, scaled gamma) with the first three moments.

    As in Nita & Gary (2010, PASP 122, 595, sec. 4): shape alpha = 4 / beta1,
    scale beta = mu3 / (2 mu2), shift delta = mean - alpha beta.
    """
    if skew == 0:
        return _Scipy(stats.norm(mean, np.sqrt(var)), name="normal")
    alpha = 4.0 / (skew * skew)
    scale = np.sqrt(var) * abs(skew) / 2.0
    if skew > 0:
        return _Scipy(stats.gamma(alpha, loc=mean - alpha * scale, scale=scale), name="III")
    return _Scipy(stats.gamma(alpha, loc=-mean - alpha * scale, scale=scale), mirror=True, name="III")


def _pearson_coefficients(var, skew, kurt):
    """b0, b1 (= a), b2 of Pearson's equation p'/p = -(a + x) / (b0 + b1 x + b2 x^2).

    x is measured from the mean; beta1 = skew^2, beta2 = kurt (Pearson 1895; e.g.
    Johnson, Kotz & Balakrishnan, Continuous Univariate Distributions, vol. 1, ch. 12).
    """
    beta1 = skew * skew
    den = 10.0 * kurt - 12.0 * beta1 - 18.0
    b0 = var * (4.0 * kurt - 3.0 * beta1) / den
    b1 = np.sqrt(var) * skew * (kurt + 3.0) / den
    b2 = (2.0 * kurt - 3.0 * beta1 - 6.0) / den
    return b0, b1, b2


def pearson_kappa(skew, kurt):
    """Pearson's criterion kappa = beta1 (beta2 + 3)^2 / (4 (4 beta2 - 3 beta1)(2 beta2 - 3 beta1 - 6)).

    kappa < 0: type I; 0 < kappa < 1: type IV; kappa > 1: type VI; kappa = 0 or
    2 beta2 - 3 beta1 - 6 = 0: type III (Nita & Gary 2010, PASP 122, 595, eq. 17).
    """
    beta1 = skew * skew
    return beta1 * (kurt + 3.0) ** 2 / (4.0 * (4.0 * kurt - 3.0 * beta1) * (2.0 * kurt - 3.0 * beta1 - 6.0))


def _fit_pearson(mean, var, skew, kurt):
    """Pearson type I, IV or VI with the first four moments, chosen by kappa."""
    b0, a, b2 = _pearson_coefficients(var, skew, kurt)
    if abs(b2) < 1e-12 * max(1.0, abs(b0)):
        return _fit_pearson3(mean, var, skew)
    disc = a * a - 4.0 * b2 * b0
    if disc < 0:  # complex roots: type IV
        lam0 = -a / (2.0 * b2)
        asq = b0 / b2 - lam0 * lam0
        ascale = np.sqrt(asq)
        m = 1.0 / (2.0 * b2)
        nu = (a + lam0) / (b2 * ascale)
        return _Type4(m, nu, ascale, mean + lam0)
    sq = np.sqrt(disc)
    r1, r2 = sorted([(-a - sq) / (2.0 * b2), (-a + sq) / (2.0 * b2)])
    big_a = (a + r1) / (b2 * (r1 - r2))  # p ~ |x - r1|^-A |x - r2|^-B
    big_b = (a + r2) / (b2 * (r2 - r1))
    if r1 < 0 < r2:  # type I: beta on (r1, r2)
        return _Scipy(stats.beta(1.0 - big_a, 1.0 - big_b, loc=mean + r1, scale=r2 - r1), name="I")
    if r2 < 0:  # type VI, support (r2, inf)
        dist = stats.betaprime(1.0 - big_b, big_a + big_b - 1.0, loc=mean + r2, scale=r2 - r1)
        return _Scipy(dist, name="VI")
    # both roots positive: type VI mirrored, support (-inf, r1)
    dist = stats.betaprime(1.0 - big_a, big_a + big_b - 1.0, loc=-(mean + r1), scale=r2 - r1)
    return _Scipy(dist, mirror=True, name="VI")


# ---------------------------------------------------------------------------
# Thresholds
# ---------------------------------------------------------------------------

def _fit(m, k, method):
    mean, var, skew, kurt = sk_moments(m, k, 1.0)
    if method == "pearson3":
        return _fit_pearson3(mean, var, skew)
    if method == "pearson":
        return _fit_pearson(mean, var, skew, kurt)
    raise ValueError(f"unknown SK threshold method {method!r}; expected one of {METHODS}")


def _compute_thresholds(m, k, pfa, method):
    if method in ("auto", "exact"):
        return _exact_thresholds(m, float(k), pfa)
    f = _fit(m, k, method)
    return float(f.lower(pfa)), float(f.upper(pfa))


# ---------------------------------------------------------------------------
# "exact" method: conditional (Skovgaard) double-saddlepoint tail of R = S2 / S1^2
# ---------------------------------------------------------------------------

class _TiltedBase:
    """Base law p^(k-1) on [0, s], tilted by exp(a p + t p^2), on a fixed grid in q = sqrt(p).

    Given S1 = s, the P_i of iid Gamma(k) powers are Dirichlet-distributed times s, and
    the same holds for iid powers of density ~ p^(k-1) e^(a p) truncated to [0, s]; the
    truncated law has a finite joint cumulant generating function in (S1, S2), which the
    untruncated gamma lacks for S2 (its P^2 has no exponential moments).
    """

    def __init__(self, k, s, nq=6001):
        # the lower tail tilts towards smaller spread, so the bulk of Gamma(k) suffices:
        # the cut at p_hi (far in the gamma tail) changes the conditional law by < 1e-20
        p_lo = max(0.0, k - 50.0 * np.sqrt(k) - 50.0)
        p_hi = min(s, k + 50.0 * np.sqrt(k) + 50.0)
        q = np.linspace(np.sqrt(p_lo), np.sqrt(p_hi), nq)
        w = np.full(nq, 1.0)
        w[1:-1:2], w[2:-1:2] = 4.0, 2.0  # Simpson weights
        w *= (q[1] - q[0]) / 3.0
        self.p = q * q
        with np.errstate(divide="ignore"):
            logq = np.log(q)
        power = (2.0 * k - 1.0) * logq if k != 0.5 else np.zeros_like(q)
        self.logw = np.log(w) + np.log(2.0) + power  # p^(k-1) dp with p = q^2
        self.logw[~np.isfinite(self.logw)] = -np.inf
        self.p_pow = np.vstack([self.p**j for j in range(5)])

    def stats(self, a, t):
        """log-normaliser K and E[p^j] (j = 1..4) under the tilt (a, t)."""
        e = self.logw + a * self.p + t * self.p * self.p
        mx = e.max()
        wt = np.exp(e - mx)
        z = wt.sum()
        mom = self.p_pow[1:] @ wt / z
        return np.log(z) + mx, mom


def _newton(base, m, s, y):
    """Minimise m K(a, t) - a s - t y (t = 0 fixed when y is None); return the solution."""
    a, t = -base.k * m / s, 0.0
    fix_t = y is None
    yy = 0.0 if fix_t else y

    def obj(a, t):
        kk, mom = base.stats(a, t)
        return m * kk - a * s - t * yy, mom

    f0, mom = obj(a, t)
    for _ in range(200):
        g_a = m * mom[0] - s
        haa = m * (mom[1] - mom[0] ** 2)
        if fix_t:
            step_a, step_t = -g_a / haa, 0.0
            dec = g_a * g_a / haa
        else:
            g_t = m * mom[1] - yy
            hat = m * (mom[2] - mom[0] * mom[1])
            htt = m * (mom[3] - mom[1] ** 2)
            det = haa * htt - hat * hat
            step_a = -(htt * g_a - hat * g_t) / det
            step_t = -(-hat * g_a + haa * g_t) / det
            dec = -(g_a * step_a + g_t * step_t)
        if dec < 1e-24 or dec < 1e-15 * abs(f0):
            break
        lam = 1.0
        while True:
            f1, mom1 = obj(a + lam * step_a, t + lam * step_t)
            if f1 <= f0 - 0.25 * lam * dec:
                break
            lam *= 0.5
            if lam < 1e-6:  # no more progress at floating-point resolution
                break
        if lam < 1e-6:
            break
        a, t, f0, mom = a + lam * step_a, t + lam * step_t, f1, mom1
    kk, mom = base.stats(a, t)
    haa = m * (mom[1] - mom[0] ** 2)
    hat = m * (mom[2] - mom[0] * mom[1])
    htt = m * (mom[3] - mom[1] ** 2)
    return a, t, m * kk, haa, haa * htt - hat * hat


@lru_cache(maxsize=256)
def _base(k, m):
    b = _TiltedBase(float(k), float(m * k))
    b.k = float(k)
    return b


def _saddle_tail_r(m, k, x, lower):
    """Skovgaard conditional saddlepoint approximation of P(R <= x) (lower) or P(R >= x).

    Skovgaard (1987, J. Appl. Prob. 24, 875); Butler (2007, Saddlepoint Approximations
    with Applications, sec. 4.2): with (a0, 0) the saddlepoint of S1 alone and (a, t)
    the joint one at (s, y),
    w = sgn(t) sqrt(2 ([K(a0,0) - a0 s] - [K(a,t) - a s - t y])),
    u = t sqrt(|K''(a,t)| / K_aa(a0,0)), and P(S2 >= y | S1 = s) = 1 - Phi(w) - phi(w) (1/w - 1/u).
    """
    base = _base(k, m)
    s = float(m * k)
    y = x * s * s
    a0, _, k0, h0, _ = _newton(base, m, s, None)
    a1, t1, k1, _, det = _newton(base, m, s, y)
    w2 = 2.0 * ((k0 - a0 * s) - (k1 - a1 * s - t1 * y))
    w = np.sign(t1) * np.sqrt(max(w2, 0.0))
    with np.errstate(invalid="ignore"):
        u = t1 * np.sqrt(det / h0)
    corr = stats.norm.pdf(w) * (1.0 / w - 1.0 / u)
    if lower:
        return stats.norm.cdf(w) + corr
    return stats.norm.sf(w) - corr


class _UpperRecursion:
    """Upper tail T_m(x) = P(R_m >= x) of R_m = sum of squared Dirichlet(k,..,k) parts.

    Stick-breaking: R_m = B^2 + (1 - B)^2 R_{m-1}, B ~ Beta(k, (m - 1) k) independent
    of R_{m-1}, R_1 = 1, so T_m(x) = E_B[T_{m-1}((x - B^2) / (1 - B)^2)].  T_m is held as
    log T on a grid uniform in xi = log((x - x0) / (1 - x)), x0 = 1/m, and the B-integral
    is a trapezoid rule in log B plus a dense patch around the mode of B; the parts
    where T_{m-1} = 1 are the exact incomplete beta functions.  Numerical, not a fit.
    """

    def __init__(self, k, ngrid=500):
        self.k = float(k)
        self.xi = np.linspace(-25.0, 25.0, ngrid)
        self.m = 1
        self.logt = None  # R_1 = 1: handled specially

    def _x_of_xi(self, m):
        x0 = 1.0 / m
        e = np.exp(self.xi)
        return (x0 + e) / (1.0 + e)

    def logtail(self, m, x):
        """log P(R_m >= x) by interpolation (m must equal self.m)."""
        x = np.asarray(x, dtype=np.float64)
        if m == 1:
            return np.where(x <= 1.0, 0.0, -np.inf)
        x0 = 1.0 / m
        with np.errstate(divide="ignore", invalid="ignore"):
            xi = np.log((x - x0) / (1.0 - x))
        out = np.interp(xi, self.xi, self.logt, left=0.0, right=-np.inf)
        out = np.where(x <= x0, 0.0, out)
        out = np.where(x >= 1.0, -np.inf, out)
        return np.minimum(out, 0.0)

    def step(self):
        m = self.m + 1
        k = self.k
        aa, bb = k, (m - 1) * k
        x = self._x_of_xi(m)[:, None]
        r0 = 1.0 / (m - 1)
        disc = np.sqrt(np.maximum(x * (1.0 + r0) - r0, 0.0))
        b_lo = np.maximum((r0 - disc) / (1.0 + r0), 0.0)
        b_hi = np.minimum((r0 + disc) / (1.0 + r0), 1.0)
        # nodes: log-uniform below b_hi, plus a uniform patch around the mode of B
        v = np.linspace(0.0, 1.0, 501)[None, :]
        lo_log = np.log(np.maximum(b_lo, b_hi * np.exp(-60.0)))
        lb = lo_log + (np.log(b_hi) - lo_log) * v
        mean = aa / (aa + bb)
        sd = np.sqrt(aa * bb / ((aa + bb) ** 2 * (aa + bb + 1)))
        p_lo = np.clip(mean - 12 * sd, b_lo, b_hi)
        p_hi = np.clip(mean + 12 * sd, b_lo, b_hi)
        patch = p_lo + (p_hi - p_lo) * np.linspace(0.0, 1.0, 301)[None, :]
        # and log-uniform in (b_hi - b), resolving the top end where b_hi is near 1
        top = b_hi - (b_hi - np.exp(lo_log)) * np.exp(-40.0 * v[:, ::-1])
        with np.errstate(divide="ignore"):
            nodes = np.sort(np.concatenate([np.exp(lb), np.maximum(patch, 1e-300), top], axis=1), axis=1)
        nodes = np.clip(nodes, np.exp(lo_log), b_hi)
        h = (x - nodes**2) / (1.0 - nodes) ** 2
        tprev = np.exp(self.logtail(m - 1, h))
        with np.errstate(divide="ignore", invalid="ignore"):
            logpdf = (special.xlogy(aa - 1.0, nodes) + special.xlog1py(bb - 1.0, -nodes)
                      - special.betaln(aa, bb))
        f = np.exp(logpdf) * tprev
        integral = np.sum(0.5 * (f[:, 1:] + f[:, :-1]) * np.diff(nodes, axis=1), axis=1)
        x1 = x[:, 0]
        total = special.betainc(aa, bb, b_lo[:, 0]) + special.betaincc(aa, bb, b_hi[:, 0]) + integral
        with np.errstate(divide="ignore"):
            self.logt = np.log(np.clip(total, 0.0, 1.0))
        self.logt[x1 <= 1.0 / m] = 0.0
        self.m = m


@lru_cache(maxsize=64)
def _upper_recursion(k, m):
    """_UpperRecursion advanced to m (cached copies per (k, m) of its log-tail grid)."""
    if m <= 1:
        rec = _UpperRecursion(k)
        return rec
    prev = _upper_recursion(k, m - 1)
    rec = _UpperRecursion(k)
    rec.m, rec.logt = prev.m, None if prev.logt is None else prev.logt.copy()
    rec.step()
    return rec


#: The upper tail comes from the stick-breaking recursion when M <= RECURSION_MAX_M and
#: (N d <= RECURSION_MAX_K or M <= 8); elsewhere the four-moment Pearson fit, which
#: measured as well or better there (module docstring), is used.
RECURSION_MAX_M = 32
RECURSION_MAX_K = 2.0


def _use_recursion(m, k):
    return m <= RECURSION_MAX_M and (k <= RECURSION_MAX_K or m <= 8)


def _bracket_root(g, s0, lo, hi, increasing, shrink=0.7):
    """Find a bracket of the root of the monotone g in (lo, hi), starting from s0."""
    s0 = min(max(s0, lo + 1e-9 * (hi - lo)), hi - 1e-9 * (hi - lo))
    g0 = g(s0)
    for _ in range(200):
        down = (g0 > 0) == increasing
        s1 = lo + (s0 - lo) * shrink if down else hi - (hi - s0) * shrink
        g1 = g(s1)
        if np.sign(g1) != np.sign(g0):
            return (min(s0, s1), max(s0, s1))
        s0, g0 = s1, g1
    raise ArithmeticError("SK threshold root not bracketed")


def _exact_lower(m, k, pfa):
    a = (m * k + 1.0) / (m - 1.0)
    lp = np.log(pfa)

    def g(skv):  # > 0 when the tail below skv holds more than pfa
        x = (skv / a + 1.0) / m
        tail = _saddle_tail_r(m, k, x, True)
        if not np.isfinite(tail) or tail <= 0:  # saddlepoint breaks down next to SK = 0
            return -50.0
        return np.log(tail) - lp

    guess = float(_fit(m, k, "pearson").lower(pfa))
    guess = min(max(guess, 1e-6), 0.999)
    lo, hi = _bracket_root(g, guess, 0.0, 1.0, True)
    return optimize.brentq(g, lo, hi, xtol=1e-10, rtol=1e-12)


def _exact_upper(m, k, pfa):
    if not _use_recursion(m, k):
        return float(_fit(m, k, "pearson").upper(pfa))
    a = (m * k + 1.0) / (m - 1.0)
    rec = _upper_recursion(float(k), m)
    lp = np.log(pfa)

    def g(skv):  # > 0 when the tail above skv holds more than pfa
        x = (skv / a + 1.0) / m
        return float(rec.logtail(m, x)) - lp

    top = m * k + 1.0  # SK <= M N d + 1 always (R <= 1)
    if g(1.0) < 0:
        raise ArithmeticError("pfa above the upper tail at the mean")
    lo, hi = _bracket_root(g, min(2.0, 0.5 * (1.0 + top)), 1.0, top, False)
    return optimize.brentq(g, lo, hi, xtol=1e-10, rtol=1e-12)


def _m2_thresholds(k, pfa):
    """M = 2 exactly: R = B^2 + (1 - B)^2, B ~ Beta(k, k); SK = (2k + 1)(2R - 1) = (2k + 1)(2B - 1)^2."""
    a = 2.0 * k + 1.0
    # P(SK <= s) = P(|2B - 1| <= sqrt(s / a)) = 2 I_{(1 + sqrt(s/a))/2}(k, k) - 1
    def q(p):  # s with P(SK <= s) = p
        return a * (2.0 * special.betaincinv(k, k, (1.0 + p) / 2.0) - 1.0) ** 2
    return float(q(pfa)), float(q(1.0 - pfa))


def _exact_thresholds(m, k, pfa):
    if m == 2:
        return _m2_thresholds(k, pfa)
    return float(_exact_lower(m, k, pfa)), float(_exact_upper(m, k, pfa))

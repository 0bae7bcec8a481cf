"""Exact moments of the generalized spectral kurtosis estimator, in rational arithmetic.

Model (Nita & Gary 2010, MNRAS 406, L60): the M powers P_1..P_M that enter one SK
estimate are independent Gamma(k) variables with shape ``k = N d`` (N presummed raw
powers, d = 1 for complex voltages, d = 1/2 for real ones); the scale cancels.  With
S1 = sum P_i, S2 = sum P_i^2 and R = S2 / S1^2,

    SK = (M k + 1) / (M - 1) * (M R - 1).

Because P / S1 is Dirichlet and independent of S1 ~ Gamma(M k),
E[S2^r] = E[R^r] E[S1^(2r)], so E[R^r] = E[S2^r] / (M k)_(2r), with (x)_j the rising
factorial.  E[S2^r] is the r-th moment of a sum of M iid copies of X = P^2, whose own
moments are E[X^j] = E[P^(2j)] = (k)_(2j); it follows from the cumulants of X (the
cumulants of a sum of M iid terms are M times those of one term).  Everything is done
with :class:`fractions.Fraction`, so the result is exact for any M >= 2, any order and
any k given as an int, a Fraction or a float (a float is an exact dyadic rational).
"""

from fractions import Fraction
from functools import lru_cache
from math import comb

__all__ = [
    "shape_k",
    "ratio_raw_moments",
    "sk_raw_moments",
    "sk_central_moments",
    "sk_moments",
]


def shape_k(n=1, d=1.0):
    """Shape k = N d of the gamma law of one presummed power, as an exact Fraction."""
    k = Fraction(n) * Fraction(d)
    if k <= 0:
        raise ValueError(f"N d must be positive, got N={n}, d={d}")
    return k


def _rising(x, j):
    """Rising factorial (x)_j = x (x+1) ... (x+j-1), exact."""
    out = Fraction(1)
    for i in range(j):
        out *= x + i
    return out


def _moments_to_cumulants(mu):
    """Cumulants kappa_1..kappa_n from raw moments mu[0]=1, mu[1..n]."""
    n = len(mu) - 1
    kap = [Fraction(0)] * (n + 1)
    for j in range(1, n + 1):
        kap[j] = mu[j] - sum(comb(j - 1, i - 1) * kap[i] * mu[j - i] for i in range(1, j))
    return kap


def _cumulants_to_moments(kap):
    """Raw moments mu[0..n] from cumulants kappa_1..kappa_n (kap[0] unused)."""
    n = len(kap) - 1
    mu = [Fraction(1)] + [Fraction(0)] * n
    for j in range(1, n + 1):
        mu[j] = sum(comb(j - 1, i - 1) * kap[i] * mu[j - i] for i in range(1, j + 1))
    return mu


def _check_m(m):
    """M as an int; SK needs at least two accumulations."""
    m = int(m)
    if m < 2:
        raise ValueError(f"SK needs M >= 2, got {m}")
    return m


@lru_cache(maxsize=1024)
def _ratio_raw_moments(m, k, order):
    x_mom = [Fraction(1)] + [_rising(k, 2 * j) for j in range(1, order + 1)]  # E[(P^2)^j]
    kap = _moments_to_cumulants(x_mom)
    s2_mom = _cumulants_to_moments([Fraction(0)] + [m * c for c in kap[1:]])  # E[S2^r]
    mk = m * k
    return tuple(s2_mom[r] / _rising(mk, 2 * r) for r in range(order + 1))


def ratio_raw_moments(m, n=1, d=1.0, order=4):
    """Exact raw moments E[R^r], r = 0..order, of R = S2 / S1^2.

    Parameters
    ----------
    m : int
        Number of powers M in the estimate (M >= 2).
    n, d : int, float
        N and d of the generalized estimator; only k = N d matters.
    order : int
        Highest moment.

    Returns
    -------
    tuple of Fraction
    """
    return _ratio_raw_moments(_check_m(m), shape_k(n, d), int(order))


@lru_cache(maxsize=1024)
def _sk_raw(m, k, order):
    rm = _ratio_raw_moments(m, k, order)
    a = (m * k + 1) / Fraction(m - 1)
    # SK = a M R - a: binomial expansion
    out = []
    for j in range(order + 1):
        out.append(sum(comb(j, i) * (a * m) ** i * rm[i] * (-a) ** (j - i) for i in range(j + 1)))
    return tuple(out)


def sk_raw_moments(m, n=1, d=1.0, order=4):
    """Exact raw moments E[SK^j], j = 0..order, of the generalized SK estimator (Fractions)."""
    return _sk_raw(_check_m(m), shape_k(n, d), int(order))


@lru_cache(maxsize=1024)
def _sk_central(m, k, order):
    raw = _sk_raw(m, k, order)
    mean = raw[1]
    out = []
    for j in range(order + 1):
        out.append(sum(comb(j, i) * raw[i] * (-mean) ** (j - i) for i in range(j + 1)))
    return tuple(out)


def sk_central_moments(m, n=1, d=1.0, order=4):
    """Exact central moments mu_j = E[(SK - 1)^j], j = 0..order (Fractions; mu_1 = 0)."""
    return _sk_central(_check_m(m), shape_k(n, d), int(order))


def sk_moments(m, n=1, d=1.0):
    """Mean, variance, skewness and kurtosis of the generalized SK estimator, exact.

    Method: closed-form moment algebra (module docstring), not simulation.
    For N = d = 1 the variance equals 4 M^2 / ((M - 1)(M + 2)(M + 3))
    (Nita et al. 2007, PASP 119, 805) and the mean is 1 for every M, N, d
    (Nita & Gary 2010, MNRAS 406, L60).

    Parameters
    ----------
    m : int
        M, the number of powers accumulated in one estimate (>= 2).
    n : int
        N, raw powers presummed into each of the M powers.
    d : float
        Shape factor d (1 complex voltage, 0.5 real voltage); any d > 0.

    Returns
    -------
    mean, variance, skewness, kurtosis : float
        ``skewness`` = mu3 / mu2^1.5 and ``kurtosis`` = beta2 = mu4 / mu2^2 (the plain,
        not the excess, kurtosis; 3 for a Gaussian).
    """
    mu = sk_central_moments(m, n, d, 4)
    raw1 = sk_raw_moments(m, n, d, 1)[1]
    var = mu[2]
    skew = float(mu[3]) / float(var) ** 1.5
    kurt = float(mu[4] / var**2)
    return float(raw1), float(var), skew, kurt

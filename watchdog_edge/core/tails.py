"""Tail probabilities and quantiles for the input checks (``range``, ``shift``).

Binomial upper tails, the gamma distribution with a whole-number shape (Erlang) and the
chi-square distribution with whole degrees of freedom, from their closed forms with
``math.lgamma``: pure Python, so the core stays free of scipy (the tests compare every
function with scipy.stats).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from functools import lru_cache

__all__ = ["binomial_limit", "chi2_isf", "chi2_sf", "erlang_isf", "erlang_sf"]


def erlang_sf(x: float, shape: int) -> float:
    """P(G > x) for G gamma-distributed with whole ``shape`` k and scale 1:
    exp(-x) sum_{j<k} x^j / j! (the Poisson identity).

    >>> round(erlang_sf(2.0, 1), 6)   # exponential: exp(-2)
    0.135335
    """
    if shape < 1:
        raise ValueError(f"shape={shape} must be a whole number >= 1")
    if x <= 0:
        return 1.0
    lx = math.log(x)
    return min(1.0, math.fsum(math.exp(-x + j * lx - math.lgamma(j + 1)) for j in range(shape)))


def _bisect_isf(sf: Callable[[float], float], p: float, hi: float) -> float:
    lo = 0.0
    while sf(hi) > p:
        lo, hi = hi, hi * 2
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if sf(mid) > p:
            lo = mid
        else:
            hi = mid
        if hi - lo <= 1e-12 * hi:
            break
    return hi


@lru_cache(maxsize=256)
def erlang_isf(p: float, shape: int) -> float:
    """The x with P(G > x) = p for G gamma(shape, 1), shape a whole number.

    >>> round(erlang_isf(0.001, 2), 4)
    9.2334
    """
    if not 0 < p < 1:
        raise ValueError(f"p={p} must be strictly between 0 and 1")
    return _bisect_isf(lambda x: erlang_sf(x, shape), p, max(1.0, 2.0 * shape))


def chi2_sf(x: float, df: int) -> float:
    """P(X > x) for X chi-square with whole ``df``: the Erlang form for even df, and
    erfc plus a half-integer series for odd df.

    >>> round(chi2_sf(3.841459, 1), 6)
    0.05
    """
    if df < 1:
        raise ValueError(f"df={df} must be a whole number >= 1")
    if x <= 0:
        return 1.0
    h = x / 2.0
    if df % 2 == 0:
        return erlang_sf(h, df // 2)
    lh = math.log(h)
    series = math.fsum(math.exp(-h + (j + 0.5) * lh - math.lgamma(j + 1.5)) for j in range(df // 2))
    return min(1.0, math.erfc(math.sqrt(h)) + series)


@lru_cache(maxsize=256)
def chi2_isf(p: float, df: int) -> float:
    """The x with P(X > x) = p for X chi-square with whole ``df``.

    >>> round(chi2_isf(0.05, 1), 4)
    3.8415
    """
    if not 0 < p < 1:
        raise ValueError(f"p={p} must be strictly between 0 and 1")
    return _bisect_isf(lambda x: chi2_sf(x, df), p, max(1.0, 2.0 * df))


@lru_cache(maxsize=4096)
def binomial_limit(m: int, q: float, alpha: float) -> int:
    """The smallest count c with P(X >= c) <= ``alpha`` for X binomial(m, q).

    A count of c or more out of m is then significant at level ``alpha`` (one-sided).
    ``alpha`` must be below 0.1 (the search starts at the mode).

    >>> binomial_limit(200, 0.01, 1e-6)
    13
    """
    if m < 1:
        raise ValueError(f"m={m} must be >= 1")
    if not 0 < alpha < 0.1:
        raise ValueError(f"alpha={alpha} must be strictly between 0 and 0.1")
    if q <= 0:
        return 1
    if q >= 1:
        return m + 1
    k0 = min(m, int((m + 1) * q))  # the mode
    logp = (
        math.lgamma(m + 1)
        - math.lgamma(k0 + 1)
        - math.lgamma(m - k0 + 1)
        + k0 * math.log(q)
        + (m - k0) * math.log1p(-q)
    )
    p = math.exp(logp)
    ratio = q / (1.0 - q)
    terms = []
    k = k0
    while k <= m:
        terms.append(p)
        if k > k0 and p < alpha * 1e-9:
            break  # the rest of the tail is far below alpha
        p *= (m - k) / (k + 1) * ratio
        k += 1
    tail = 0.0
    for i in range(len(terms) - 1, -1, -1):
        tail += terms[i]
        if tail > alpha:
            return k0 + i + 1
    return k0  # P(X >= mode) <= alpha: cannot happen for alpha < 0.1 except when q is tiny

"""Statistics the checks rely on: Student t, normal, chi-square and F quantiles, Newey-West
long-run variance with an automatic bandwidth (plain, and prewhitened), one-sided intervals on
a mean, and the Diebold-Mariano test. Pure numpy and math, so the core stays free of scipy."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

__all__ = [
    "DMResult",
    "LossInterval",
    "MeanInterval",
    "andrews_bandwidth",
    "chi2_ppf",
    "diebold_mariano",
    "f_ppf",
    "long_run_variance",
    "loss_interval",
    "mean_interval",
    "normal_ppf",
    "prewhitened_long_run_variance",
    "t_ppf",
    "t_sf",
    "window_span_level",
]


@dataclass(frozen=True)
class MeanInterval:
    """Mean of a series with one-sided lower and upper bounds at the requested confidence."""

    mean: float
    lower: float
    upper: float
    std_error: float
    bandwidth: float
    n: int


@dataclass(frozen=True)
class DMResult:
    """Outcome of a one-sided Diebold-Mariano test (H1: loss_a has the larger mean)."""

    statistic: float
    p_value: float
    mean_difference: float
    n: int
    bandwidth: float


# ---------------------------------------------------------------- argument checks


def _check_probability(p: float, name: str = "p") -> float:
    p = float(p)
    if not (0.0 < p < 1.0):
        raise ValueError(
            f"{name}={p!r} is outside the open interval (0, 1); pass a probability strictly between 0 and 1"
        )
    return p


def _check_df(df: float) -> float:
    df = float(df)
    if not (df > 0.0) or math.isinf(df):
        raise ValueError(f"df={df!r} must be a finite number greater than 0 (degrees of freedom)")
    return df


def _as_series(x: np.ndarray, name: str, min_len: int = 1) -> np.ndarray:
    arr = np.asarray(x, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be a one-dimensional series, got shape {arr.shape}")
    if arr.size < min_len:
        raise ValueError(f"{name} has {arr.size} values; at least {min_len} are needed")
    bad = np.flatnonzero(~np.isfinite(arr))
    if bad.size:
        i = int(bad[0])
        raise ValueError(f"{name}[{i}]={arr[i]!r} is not a finite number; drop or repair it first")
    return arr


# ---------------------------------------------------------------- normal quantile

# Wichura (1988), Algorithm AS 241 "The percentage points of the normal distribution",
# Applied Statistics 37(3), PPND16 (about 1e-16 relative). Coefficients from memory;
# tests check the result against scipy.stats.norm.ppf.
_A = (
    3.3871328727963666080e0,
    1.3314166789178437745e2,
    1.9715909503065514427e3,
    1.3731693765509461125e4,
    4.5921953931549871457e4,
    6.7265770927008700853e4,
    3.3430575583588128105e4,
    2.5090809287301226727e3,
)
_B = (
    1.0,
    4.2313330701600911252e1,
    6.8718700749205790830e2,
    5.3941960214247511077e3,
    2.1213794301586595867e4,
    3.9307895800092710610e4,
    2.8729085735721942674e4,
    5.2264952788528545610e3,
)
_C = (
    1.42343711074968357734e0,
    4.63033784615654529590e0,
    5.76949722146069140550e0,
    3.64784832476320460504e0,
    1.27045825245236838258e0,
    2.41780725177450611770e-1,
    2.27238449892691845833e-2,
    7.74545014278341407640e-4,
)
_D = (
    1.0,
    2.05319162663775882187e0,
    1.67638483018380384940e0,
    6.89767334985100004550e-1,
    1.48103976427480074590e-1,
    1.51986665636164571966e-2,
    5.47593808499534494600e-4,
    1.05075007164441684324e-9,
)
_E = (
    6.65790464350110377720e0,
    5.46378491116411436990e0,
    1.78482653991729133580e0,
    2.96560571828504891230e-1,
    2.65321895265761230930e-2,
    1.24266094738807843860e-3,
    2.71155556874348757815e-5,
    2.01033439929228813265e-7,
)
_F = (
    1.0,
    5.99832206555887937690e-1,
    1.36929880922735805310e-1,
    1.48753612908506148525e-2,
    7.86869131145613259100e-4,
    1.84631831751005468180e-5,
    1.42151175831644588870e-7,
    2.04426310338993978564e-15,
)


def _poly(coef: tuple[float, ...], r: float) -> float:
    acc = 0.0
    for c in reversed(coef):
        acc = acc * r + c
    return acc


def normal_ppf(p: float) -> float:
    """Standard normal quantile (Wichura's AS 241).

    >>> round(normal_ppf(0.975), 6)
    1.959964
    """
    p = _check_probability(p)
    q = p - 0.5
    if abs(q) <= 0.425:
        r = 0.180625 - q * q
        return q * _poly(_A, r) / _poly(_B, r)
    r = math.sqrt(-math.log(p if q < 0 else 1.0 - p))
    if r <= 5.0:
        r -= 1.6
        val = _poly(_C, r) / _poly(_D, r)
    else:
        r -= 5.0
        val = _poly(_E, r) / _poly(_F, r)
    return -val if q < 0 else val


# ---------------------------------------------------------------- incomplete beta

_STIRLING = (1.0 / 12.0, -1.0 / 360.0, 1.0 / 1260.0, -1.0 / 1680.0, 1.0 / 1188.0)


def _stirling_tail(z: float) -> float:
    """ln Gamma(z) - [(z - 1/2) ln z - z + ln(2 pi)/2], asymptotic series (z >= 10)."""
    inv = 1.0 / z
    inv2 = inv * inv
    acc = 0.0
    for c in reversed(_STIRLING):
        acc = acc * inv2 + c
    return acc * inv


def _log_beta(a: float, b: float) -> float:
    """ln B(a, b), without the cancellation of lgamma differences when one argument is large."""
    big, small = (a, b) if a >= b else (b, a)
    if big < 10.0:
        return math.lgamma(a) + math.lgamma(b) - math.lgamma(a + b)
    # ln G(big) - ln G(big + small) written so no two large numbers are subtracted.
    diff = (
        -(big - 0.5) * math.log1p(small / big)
        - small * math.log(big + small)
        + small
        + _stirling_tail(big)
        - _stirling_tail(big + small)
    )
    return math.lgamma(small) + diff


def _beta_cf(a: float, b: float, x: float, y: float) -> float:
    """Continued fraction for I_x(a, b) (modified Lentz; Numerical Recipes' betacf), y = 1 - x."""
    tiny = 1e-300
    qab, qap, qam = a + b, a + 1.0, a - 1.0
    c = 1.0
    d = 1.0 - qab * x / qap
    if abs(d) < tiny:
        d = tiny
    d = 1.0 / d
    h = d
    # Converges in O(sqrt(max(a, b))) terms; df up to ~1e7 stays well inside this cap.
    for m in range(1, 20000):
        m2 = 2 * m
        aa = m * (b - m) * x / ((qam + m2) * (a + m2))
        d = 1.0 + aa * d
        d = tiny if abs(d) < tiny else d
        c = 1.0 + aa / c
        c = tiny if abs(c) < tiny else c
        d = 1.0 / d
        h *= d * c
        aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2))
        d = 1.0 + aa * d
        d = tiny if abs(d) < tiny else d
        c = 1.0 + aa / c
        c = tiny if abs(c) < tiny else c
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1.0) < 1e-16:
            return h
    raise ArithmeticError(f"incomplete beta continued fraction did not converge for a={a}, b={b}, x={x}")


def _beta_pair(a: float, b: float, x: float, y: float, log_x: float, log_y: float) -> tuple[float, float]:
    """(I_x(a, b), 1 - I_x(a, b)); the smaller one is computed directly, so both keep
    relative accuracy in the tails. x + y = 1, both passed in to avoid rounding 1 - x."""
    if x <= 0.0:
        return 0.0, 1.0
    if y <= 0.0:
        return 1.0, 0.0
    front = math.exp(a * log_x + b * log_y - _log_beta(a, b))
    if x < (a + 1.0) / (a + b + 2.0):
        i = front * _beta_cf(a, b, x, y) / a
        return i, 1.0 - i
    j = front * _beta_cf(b, a, y, x) / b
    return 1.0 - j, j


def _t_tails(t: float, df: float) -> tuple[float, float]:
    """For t >= 0: (P(T > t), P(0 < T < t)), each with relative accuracy."""
    if math.isinf(t):
        return 0.0, 0.5
    t2 = t * t
    # x = df / (df + t^2), y = t^2 / (df + t^2); logs computed without forming 1 - x.
    if t2 < df:
        log_x = -math.log1p(t2 / df)
        x = math.exp(log_x)
        y = t2 / (df + t2)
        log_y = math.log(y) if y > 0.0 else -math.inf
    else:
        log_y = -math.log1p(df / t2)
        y = math.exp(log_y)
        x = df / (df + t2)
        log_x = math.log(x) if x > 0.0 else -math.inf
    upper, central = _beta_pair(0.5 * df, 0.5, x, y, log_x, log_y)
    return 0.5 * upper, 0.5 * central


def t_sf(x: float, df: float) -> float:
    """Upper tail P(T > x) of Student t with `df` degrees of freedom (df need not be whole).

    Uses the regularized incomplete beta function by continued fraction.

    >>> round(t_sf(2.0, 10), 6)
    0.036694
    """
    df = _check_df(df)
    x = float(x)
    if math.isnan(x):
        raise ValueError("x=nan is not a number; pass a finite or infinite t value")
    if x >= 0.0:
        return _t_tails(x, df)[0]
    return 0.5 + _t_tails(-x, df)[1]


def _t_pdf(t: float, df: float) -> float:
    log_c = -0.5 * math.log(df) - _log_beta(0.5 * df, 0.5)
    return math.exp(log_c - 0.5 * (df + 1.0) * math.log1p(t * t / df))


# ---------------------------------------------------------------- t quantile


def _hill_start(q: float, df: float) -> float:
    """Hill (1970), CACM Algorithm 396 "Student's t-quantiles": t with P(|T| > t) = 2q."""
    p2 = 2.0 * q  # the algorithm takes the two-tailed probability
    n = df
    if n == 1.0:
        a = p2 * math.pi / 2.0
        return math.cos(a) / math.sin(a)
    if n == 2.0:
        return math.sqrt(2.0 / (p2 * (2.0 - p2)) - 2.0)
    if n < 1.0:
        # Outside Hill's range; the Cauchy quantile is a usable start for the solver.
        a = p2 * math.pi / 2.0
        return math.cos(a) / math.sin(a)
    a = 1.0 / (n - 0.5)
    b = 48.0 / (a * a)
    c = ((20700.0 * a / b - 98.0) * a - 16.0) * a + 96.36
    d = ((94.5 / (b + c) - 3.0) / b + 1.0) * math.sqrt(a * math.pi / 2.0) * n
    x = d * p2
    y = x ** (2.0 / n)
    if y > 0.05 + a:
        # Asymptotic inverse expansion about the normal quantile.
        x = normal_ppf(0.5 * p2)
        y = x * x
        if n < 5.0:
            c += 0.3 * (n - 4.5) * (x + 0.6)
        c = (((0.05 * d * x - 5.0) * x - 7.0) * x - 2.0) * x + b + c
        y = (((((0.4 * y + 6.3) * y + 36.0) * y + 94.5) / c - y - 3.0) / b + 1.0) * x
        y = math.expm1(a * y * y)
    else:
        y = ((1.0 / (((n + 6.0) / (n * y) - 0.089 * d - 0.822) * (n + 2.0) * 3.0) + 0.5 / (n + 4.0)) * y - 1.0) * (
            n + 1.0
        ) / (n + 2.0) + 1.0 / y
    return math.sqrt(n * y)


# Each cached quantile costs about 170 bytes. A long-running agent keeps the default; a run
# that replays many settings over one recording (tune) makes room for all it meets, since an
# LRU cache smaller than the cycle of keys that repeats across settings misses on every key.
_QUANTILE_CACHE_ENTRIES = 1024


@lru_cache(maxsize=_QUANTILE_CACHE_ENTRIES)
def _t_upper_quantile(q: float, df: float) -> float:
    """t >= 0 with P(T > t) = q, for 0 < q <= 0.5: Hill's start refined by safeguarded Newton."""
    if q == 0.5:
        return 0.0
    mid = 0.5 - q  # exact for q in [0.25, 0.5], used as target of the central mass there
    use_central = q > 0.25

    def residual(t: float) -> float:
        upper, central = _t_tails(t, df)
        # Positive when t is too small.
        return (mid - central) if use_central else (upper - q)

    t = _hill_start(q, df)
    if not (math.isfinite(t) and t > 0.0):
        t = 1.0
    lo, hi = 0.0, math.inf
    for _ in range(200):
        r = residual(t)
        if r > 0.0:
            lo = t
        elif r < 0.0:
            hi = t
        else:
            return t
        step = r / _t_pdf(t, df)
        new = t + step
        if not (lo < new < hi) or not math.isfinite(new):
            # Newton left the bracket: bisect (geometrically while the bracket is open above).
            new = 2.0 * t if math.isinf(hi) else (0.5 * (lo + hi) if lo > 0.0 else 0.5 * hi)
        if abs(new - t) <= 1e-15 * abs(new):
            return new
        t = new
    return t


def t_ppf(p: float, df: float) -> float:
    """Quantile of Student t: the x with P(T <= x) = p (df > 0, need not be whole).

    Hill (1970) Algorithm 396 gives the start; Newton steps on the exact CDF polish it.

    >>> round(t_ppf(0.975, 10), 6)
    2.228139
    >>> round(t_ppf(0.025, 10), 6)
    -2.228139
    """
    p = _check_probability(p)
    df = _check_df(df)
    if p < 0.5:
        return -_t_upper_quantile(p, df)
    return _t_upper_quantile(1.0 - p, df)  # 1 - p is exact for p >= 0.5


# ---------------------------------------------------------------- chi-square and F quantiles

# Live degrees of freedom are clipped to this range: below 1 the bounds of a burst-dominated
# window run to absurd figures (and 0 or infinity in floating point), above it the quantile is
# the limit one within far less than the noise of the estimate.
_DF_MIN, _DF_MAX = 1.0, 1e6


def _gamma_pair(a: float, x: float) -> tuple[float, float]:
    """(P(a, x), Q(a, x)), the regularized incomplete gamma and its complement, the smaller one
    computed directly: the power series below x = a + 1, Legendre's continued fraction above
    (modified Lentz), as in Press et al., Numerical Recipes, section 6.2 (from memory)."""
    if x <= 0.0:
        return 0.0, 1.0
    front = math.exp(a * math.log(x) - x - math.lgamma(a))
    if x < a + 1.0:
        term = total = 1.0 / a
        ap = a
        for _ in range(100000):
            ap += 1.0
            term *= x / ap
            total += term
            if term < total * 1e-16:
                p = front * total
                return p, 1.0 - p
        raise ArithmeticError(f"incomplete gamma series did not converge for a={a}, x={x}")
    tiny = 1e-300
    b = x + 1.0 - a
    c = 1.0 / tiny
    d = 1.0 / b
    h = d
    for i in range(1, 100000):
        an = -i * (i - a)
        b += 2.0
        d = an * d + b
        d = tiny if abs(d) < tiny else d
        c = b + an / c
        c = tiny if abs(c) < tiny else c
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1.0) < 1e-16:
            q = front * h
            return 1.0 - q, q
    raise ArithmeticError(f"incomplete gamma continued fraction did not converge for a={a}, x={x}")


def _solve_cdf(
    pair: Callable[[float], tuple[float, float]],
    pdf: Callable[[float], float],
    p: float,
    start: float,
    lo: float,
    hi: float,
) -> float:
    """The v in (lo, hi) with cdf(v) = p, by Newton steps kept inside a shrinking bracket.

    ``pair(v)`` gives (cdf, 1 - cdf), each with relative accuracy; the tail nearer to p is
    matched, so both small and large p keep their digits. ``hi`` may be infinite."""
    lower_tail = p <= 0.5
    target = p if lower_tail else 1.0 - p
    v = start if lo < start < hi else (0.5 * (lo + hi) if math.isfinite(hi) else lo + 1.0)
    for _ in range(400):
        c, q = pair(v)
        r = (c - target) if lower_tail else (target - q)  # positive when v is too large
        if r > 0.0:
            hi = v
        elif r < 0.0:
            lo = v
        else:
            return v
        dens = pdf(v)
        new = v - r / dens if dens > 0.0 else math.nan
        if not (lo < new < hi) or not math.isfinite(new):
            # Newton left the bracket: grow while it is open above, else bisect.
            new = 2.0 * v + 1.0 if math.isinf(hi) else 0.5 * (lo + hi)
        if abs(new - v) <= 1e-14 * abs(new):
            return new
        v = new
    return v


@lru_cache(maxsize=_QUANTILE_CACHE_ENTRIES)
def _chi2_ppf_cached(p: float, df: float) -> float:
    a = 0.5 * df
    z = normal_ppf(p)
    h = 2.0 / (9.0 * df)
    wh = df * (1.0 - h + z * math.sqrt(h)) ** 3  # Wilson and Hilferty (1931), the start
    if not wh > 0.0:
        # Leading term of the series near zero: P(a, x/2) ~ (x/2)^a / Gamma(a + 1).
        wh = 2.0 * math.exp((math.log(p) + math.lgamma(a + 1.0)) / a)
    log_norm = -math.lgamma(a) - a * math.log(2.0)

    def pair(x: float) -> tuple[float, float]:
        return _gamma_pair(a, 0.5 * x)

    def pdf(x: float) -> float:
        return math.exp(log_norm + (a - 1.0) * math.log(x) - 0.5 * x) if x > 0.0 else 0.0

    return _solve_cdf(pair, pdf, p, wh, 0.0, math.inf)


def chi2_ppf(p: float, df: float) -> float:
    """Quantile of the chi-square distribution with ``df`` degrees of freedom (need not be whole).

    >>> round(chi2_ppf(0.95, 10), 6)
    18.307038
    """
    p = _check_probability(p)
    return _chi2_ppf_cached(p, _check_df(df))


def _beta_solve(a: float, b: float, p: float, start: float) -> float:
    """The y with I_y(a, b) = p."""
    log_norm = -_log_beta(a, b)

    def pair(y: float) -> tuple[float, float]:
        if y <= 0.0:
            return 0.0, 1.0
        if y >= 1.0:
            return 1.0, 0.0
        return _beta_pair(a, b, y, 1.0 - y, math.log(y), math.log1p(-y))

    def pdf(y: float) -> float:
        if not 0.0 < y < 1.0:
            return 0.0
        return math.exp(log_norm + (a - 1.0) * math.log(y) + (b - 1.0) * math.log1p(-y))

    return _solve_cdf(pair, pdf, p, start, 0.0, 1.0)


def _paulson_start(p: float, d1: float, d2: float) -> float:
    """A start for the F quantile: the cube root of F taken as normal (Paulson 1942, after
    Wilson and Hilferty; cited from memory), within about a percent for moderate degrees of
    freedom, so Newton needs a few steps instead of a dozen from the mean. Falls back to the
    mean where the quadratic has no usable root (tiny d1 or d2, extreme p)."""
    z = normal_ppf(p)
    a, b = 2.0 / (9.0 * d1), 2.0 / (9.0 * d2)
    lead = (1.0 - b) ** 2 - z * z * b
    disc = (1.0 - a) ** 2 * b + (1.0 - b) ** 2 * a - z * z * a * b
    if lead > 0.0 and disc >= 0.0:
        u = ((1.0 - a) * (1.0 - b) + z * math.sqrt(disc)) / lead
        if u > 0.0:
            return u**3
    return max(1e-3, d2 / max(d2 - 2.0, 1.0))


@lru_cache(maxsize=_QUANTILE_CACHE_ENTRIES)
def _f_ppf_cached(p: float, d1: float, d2: float) -> float:
    if math.isinf(d2):
        return _chi2_ppf_cached(p, d1) / d1
    # F = (d2 / d1) y / (1 - y) with y ~ Beta(d1/2, d2/2). Solve for whichever of y and
    # w = 1 - y ~ Beta(d2/2, d1/2) is the smaller, so that 1 - y is never formed by subtraction.
    x0 = (_chi2_ppf_cached(p, d1) / d1) if d2 > 1e4 else _paulson_start(p, d1, d2)
    y0 = d1 * x0 / (d1 * x0 + d2)
    if y0 <= 0.5:
        y = _beta_solve(0.5 * d1, 0.5 * d2, p, y0)
        return d2 * y / (d1 * (1.0 - y))
    w = _beta_solve(0.5 * d2, 0.5 * d1, 1.0 - p, 1.0 - y0)
    return d2 * (1.0 - w) / (d1 * w)


def f_ppf(p: float, d1: float, d2: float) -> float:
    """Quantile of the F distribution with (d1, d2) degrees of freedom; d2 may be ``math.inf``
    (then it is the quantile of chi-square(d1) / d1).

    >>> round(f_ppf(0.95, 5, 10), 6)
    3.325835
    """
    p = _check_probability(p)
    d1 = _check_df(d1)
    d2 = float(d2)
    if not d2 > 0.0:
        raise ValueError(f"d2={d2!r} must be a number greater than 0 (degrees of freedom), or math.inf")
    return _f_ppf_cached(p, d1, d2)


# ---------------------------------------------------------------- long-run variance

# |rho| is clipped here: as rho -> 1 the plug-in bandwidth grows without bound and the
# AR(1) fit of a near-unit-root window is not trustworthy anyway (common practice, no
# single source; the value 0.97 is a project choice).
_RHO_CLIP = 0.97


def andrews_bandwidth(x: np.ndarray) -> float:
    """Andrews (1991) AR(1) plug-in bandwidth S for the Bartlett kernel, 1.1447 (alpha(1) n)^(1/3).

    Returns 0.0 for a constant series or fewer than 3 values (no autocorrelation to fit).

    >>> round(andrews_bandwidth(np.array([1.0, 2.0, 3.0, 4.0, 3.0, 2.0, 1.0, 2.0, 3.0, 4.0])), 3)
    2.7
    """
    return _bandwidth_of_demeaned(_demeaned(_as_series(x, "x")))


def _demeaned(arr: np.ndarray) -> np.ndarray:
    return arr - arr.mean()


def _bandwidth_of_demeaned(z: np.ndarray) -> float:
    n = z.size
    if n < 3:
        return 0.0
    denom = float(np.dot(z[:-1], z[:-1]))
    if denom <= 0.0 or not np.any(z):
        return 0.0
    rho = float(np.dot(z[1:], z[:-1])) / denom
    rho = min(max(rho, -_RHO_CLIP), _RHO_CLIP)
    alpha1 = 4.0 * rho * rho / ((1.0 - rho) ** 2 * (1.0 + rho) ** 2)
    return 1.1447 * (alpha1 * n) ** (1.0 / 3.0)


def _bartlett_lags(bandwidth: float, n: int) -> int:
    """Largest lag j with positive weight 1 - j/S (j < S), capped at n - 1."""
    if bandwidth <= 1.0:
        return 0
    top = math.ceil(bandwidth) - 1  # j < S
    return int(min(top, n - 1))


def long_run_variance(x: np.ndarray, bandwidth: float | None = None) -> float:
    """Newey-West (1987) long-run variance with the Bartlett kernel.

    gamma_0 + 2 sum_j (1 - j/S) gamma_j over lags j < S (capped at n - 1); autocovariances
    about the sample mean with divisor n. S defaults to `andrews_bandwidth(x)`.

    >>> round(long_run_variance(np.array([1.0, 2.0, 3.0, 4.0]), bandwidth=2.0), 4)
    1.5625
    """
    arr = _as_series(x, "x")
    if bandwidth is None:
        bandwidth = andrews_bandwidth(arr)
    else:
        bandwidth = float(bandwidth)
        if not (bandwidth >= 0.0) or math.isinf(bandwidth):
            raise ValueError(f"bandwidth={bandwidth!r} must be a finite number >= 0 (or None for automatic)")
    return _lrv_of_demeaned(_demeaned(arr), bandwidth)


def _lrv_of_demeaned(z: np.ndarray, bandwidth: float) -> float:
    n = z.size
    lags = _bartlett_lags(bandwidth, n)
    if lags == 0:
        return max(0.0, float(np.dot(z, z)) / n)
    # Every lag's sum of products in one call: entry j of the valid correlation of z padded
    # with ``lags`` zeros against z is sum_t z[t + j] z[t] (a loop of dots cost ten times more).
    gamma = np.correlate(np.concatenate((z, np.zeros(lags))), z, mode="valid")
    weights = 1.0 - np.arange(1, lags + 1) / bandwidth
    total = float(gamma[0]) + 2.0 * float(np.dot(weights, gamma[1:]))
    # The Bartlett kernel keeps the estimate non-negative; max() only absorbs rounding.
    return max(0.0, total / n)


def _prewhitened_of_demeaned(z: np.ndarray) -> tuple[float, float, float]:
    """(long-run variance, bandwidth on the residuals, AR coefficient used) of a demeaned series."""
    return _prewhitened_parts(z)[:3]


def _prewhitened_parts(z: np.ndarray) -> tuple[float, float, float, float]:
    """`_prewhitened_of_demeaned` and, fourth, the variance of the logarithm of the estimate
    (delta method): the noise of the residuals' variance, (kurtosis - 1) / n, plus that of
    the AR coefficient, (1 - rho^2) / n, through the recolouring's d ln / d rho = 2 / (1 - rho).
    The Bartlett lags on the residuals are left out (their bandwidth is short once prewhitened)."""
    n = z.size
    if n < 3:
        return max(0.0, float(np.dot(z, z)) / max(n, 1)), 0.0, 0.0, 0.0
    denom = float(np.dot(z[:-1], z[:-1]))
    if denom <= 0.0:
        return 0.0, 0.0, 0.0, 0.0
    rho = float(np.dot(z[1:], z[:-1])) / denom
    rho = min(max(rho, -_RHO_CLIP), _RHO_CLIP)
    u = z[1:] - rho * z[:-1]
    u = u - u.mean()
    bw = _bandwidth_of_demeaned(u)
    lrv_u = _lrv_of_demeaned(u, bw) * (u.size / n)
    # Recolouring divides by (1 - rho)^2, which is steep near 1 and so turns the estimate's
    # downward small-sample bias and its noise into too narrow an interval on persistent
    # losses. So rho is corrected for its bias, -(1 + 3 rho) / n (Kendall 1954, from memory),
    # and then taken one standard error, sqrt((1 - rho^2) / n), towards persistence: our
    # choice, checked by the coverage test in tests/test_stats.py. Negative rho is left as is
    # (it shrinks the variance less, and losses are seldom negatively autocorrelated).
    if rho > 0.0:
        rho = min(rho + (1.0 + 3.0 * rho) / n + math.sqrt(max(0.0, 1.0 - rho * rho) / n), _RHO_CLIP)
    m2 = float(np.dot(u, u)) / u.size
    kurt = float(np.dot(u * u, u * u)) / u.size / (m2 * m2) if m2 > 0.0 else 1.0
    var_log = max(kurt - 1.0, 0.0) / u.size + 4.0 * (1.0 - rho * rho) / (n * (1.0 - rho) ** 2)
    return lrv_u / (1.0 - rho) ** 2, bw, rho, var_log


def prewhitened_long_run_variance(x: np.ndarray) -> float:
    """Long-run variance with AR(1) prewhitening (Andrews and Monahan 1992): fit
    z_t = rho z_(t-1) + u_t, take the Newey-West variance of u with Andrews' bandwidth, and
    recolour it by 1 / (1 - rho)^2, rho adjusted as explained in the code.

    >>> rng = np.random.default_rng(0)
    >>> round(prewhitened_long_run_variance(rng.normal(size=2000)), 1)
    1.0
    """
    arr = _as_series(x, "x")
    return _prewhitened_of_demeaned(_demeaned(arr))[0]


# ---------------------------------------------------------------- interval and DM test


def mean_interval(x: np.ndarray, confidence: float) -> MeanInterval:
    """Mean of `x` with one-sided bounds at `confidence`, each from se = sqrt(lrv / n)
    and the Student t quantile at n - 1 degrees of freedom.

    >>> iv = mean_interval(np.array([1.0, 2.0, 3.0, 4.0, 5.0]), 0.95)
    >>> iv.mean, iv.n
    (3.0, 5)
    >>> iv.lower < 3.0 < iv.upper
    True
    """
    arr = _as_series(x, "x", min_len=2)
    confidence = float(confidence)
    if not (0.5 <= confidence < 1.0):
        raise ValueError(f"confidence={confidence!r} must be in [0.5, 1) (one-sided level, e.g. 0.95)")
    n = arr.size
    mean = float(arr.mean())
    z = arr - mean  # one validated, demeaned pass serves the bandwidth and the variance
    bw = _bandwidth_of_demeaned(z)
    se = math.sqrt(_lrv_of_demeaned(z, bw) / n)
    half = (t_ppf(confidence, n - 1) if confidence > 0.5 else 0.0) * se
    return MeanInterval(mean=mean, lower=mean - half, upper=mean + half, std_error=se, bandwidth=bw, n=n)


@dataclass(frozen=True)
class LossInterval:
    """One-sided bounds on the mean of a non-negative loss series, alone and against a card.

    ``lower_live`` and ``upper`` bound the live mean; ``lower`` also carries the uncertainty
    of the expected loss it is compared with (the card's ``card_df``): see `loss_interval`.
    """

    mean: float
    lower: float
    lower_live: float
    upper: float
    std_error: float
    live_df: float
    card_df: float
    bandwidth: float
    rho: float
    n: int
    variance_df: float = math.inf
    lower_level: float = math.nan  # normal-scale level of the lower bounds after the Student correction


def _df_grid(df: float) -> float:
    """``df`` rounded down to two significant digits (so quantiles repeat and are cached;
    fewer degrees of freedom only widen the bounds)."""
    if df <= _DF_MIN:
        return _DF_MIN
    if df >= _DF_MAX:
        return _DF_MAX
    step = 10.0 ** (math.floor(math.log10(df)) - 1)
    return max(_DF_MIN, math.floor(df / step) * step)


_DF_STEPS_PER_DECADE = 20


def _df_steps(df: float) -> float:
    """``df`` rounded down to a grid of 20 steps a decade (each 12 % above the one before).

    Fewer degrees of freedom only widen the bounds: a 99 % t quantile by at most 2.3 % from
    10 degrees of freedom up, 0.4 % from 50 (scipy's t.ppf over one step).

    >>> round(_df_steps(47.0), 2), _df_steps(100.0), _df_steps(0.5)
    (44.67, 100.0, 1.0)
    """
    if df <= _DF_MIN:
        return _DF_MIN
    if df >= _DF_MAX:
        return _DF_MAX
    k = math.floor(math.log10(df) * _DF_STEPS_PER_DECADE + 1e-9)
    return max(_DF_MIN, 10.0 ** (k / _DF_STEPS_PER_DECADE))


def window_span_level(confidence: float) -> float:
    """One-look confidence at which a moving-window bound, looked at (nearly) continuously,
    is crossed by chance within one window span with probability 1 - ``confidence``.

    A standardized mean over a moving window of n pairs is a stationary process whose
    correlation at a lag of s pairs is 1 - s/n; for such a process Pickands' asymptotics give
    P(max over T pairs > b) ~ (T / n) b phi(b) (Pickands 1969; Leadbetter, Lindgren and
    Rootzen 1983; from memory), against phi(b) / b for one look. So b solves
    b phi(b) = 1 - confidence, and the one-look level is Phi(b). Looks every k pairs cross
    less often than continuous looking, so the level is on the safe side.

    >>> round(window_span_level(0.95), 4)
    0.9926
    """
    alpha = 1.0 - _check_probability(confidence, "confidence")

    def crossings(b: float) -> float:
        return b * math.exp(-0.5 * b * b) / math.sqrt(2.0 * math.pi)

    if alpha >= crossings(1.0):  # b phi(b) peaks at b = 1: nothing to correct
        return confidence
    lo, hi = 1.0, 40.0
    for _ in range(200):  # b phi(b) falls on [1, inf): bisect
        mid = 0.5 * (lo + hi)
        if crossings(mid) > alpha:
            lo = mid
        else:
            hi = mid
        if hi - lo < 1e-12:
            break
    return max(confidence, 1.0 - 0.5 * math.erfc(hi / math.sqrt(2.0)))


def _student_level(p: float, df: float) -> float:
    """The normal-scale level at which a bound with a standard error of ``df`` degrees of
    freedom is as wide as Student's t makes it: Phi(t_p(df))."""
    if df >= _DF_MAX:
        return p
    # Kept below 1 - 1e-9 (z = 6): with so few degrees of freedom the bound says nothing anyway.
    return min(0.5 * math.erfc(-t_ppf(p, df) / math.sqrt(2.0)), 1.0 - 1e-9)


def loss_interval(
    x: np.ndarray, confidence: float, card_df: float = math.inf, raise_confidence: float | None = None
) -> LossInterval:
    """Bounds on the mean of non-negative losses, on the scale of a gamma distribution.

    The mean m of n losses is taken as m ~ mu chi2(v) / v, a gamma law matched to the mean
    and its standard error (Satterthwaite 1946: v = 2 m^2 / se^2), with se from the prewhitened
    long-run variance; for independent squared Gaussian errors v = n and the law is exact.
    Bounds: ``lower_live`` = m v / chi2_conf(v), ``upper`` = m v / chi2_(1-conf)(v); both
    positive, the upper one further from m than the lower, as the skew of losses needs.
    Against an expected loss that is itself a mean square with ``card_df`` degrees of freedom,
    m / expected ~ (mu / expected_true) F(v, card_df) under Gaussian errors, so ``lower`` =
    m / F_conf(v, card_df): compared with expected x (1 + tolerance), it raises only when the
    gap is beyond both the live window's noise and the card's. card_df = inf gives lower_live.

    The standard error is itself an estimate, noisy where the effective sample is small
    (persistent or heavy-tailed losses): its logarithm has variance w from the delta method
    (`_prewhitened_parts`), i.e. about ``variance_df`` = 2 / w degrees of freedom, and every
    level p is taken as Phi(t_p(variance_df)), the normal-scale level a Student t bound with
    those degrees of freedom has (our rule, checked by the coverage tests in tests/test_stats.py).
    ``raise_confidence`` (default ``confidence``) sets the level of the two lower bounds only.

    >>> iv = loss_interval(np.random.default_rng(1).chisquare(1, 500), 0.95, card_df=30)
    >>> iv.lower < iv.lower_live < iv.mean < iv.upper
    True
    """
    arr = _as_series(x, "x", min_len=2)
    confidence = float(confidence)
    if not (0.5 < confidence < 1.0):
        raise ValueError(f"confidence={confidence!r} must be in (0.5, 1) (one-sided level, e.g. 0.95)")
    card_df = float(card_df)
    if not card_df > 0.0:
        raise ValueError(f"card_df={card_df!r} must be a number greater than 0, or math.inf")
    if float(arr.min()) < 0.0:
        raise ValueError(f"x has a negative value {float(arr.min())!r}; losses are never negative")
    n = arr.size
    mean = float(arr.mean())
    z = arr - mean
    up_level = confidence
    if raise_confidence is not None:
        raise_confidence = float(raise_confidence)
        if not (0.5 < raise_confidence < 1.0):
            raise ValueError(f"raise_confidence={raise_confidence!r} must be in (0.5, 1) (one-sided level)")
        confidence = raise_confidence
    lrv, bw, rho, var_log = _prewhitened_parts(z)
    se = math.sqrt(lrv / n)
    if mean <= 0.0:
        return LossInterval(0.0, 0.0, 0.0, 0.0, se, _DF_MAX, card_df, bw, rho, n, _DF_MAX, confidence)
    # The variance's own degrees of freedom are a rough figure, and each value makes new
    # levels, hence new quantiles to solve: a geometric grid (rounded down) keeps them few.
    var_df = _df_steps(2.0 / var_log) if var_log > 0.0 else _DF_MAX
    lo_p = _student_level(confidence, var_df)
    up_p = _student_level(up_level, var_df)
    live_df = _df_grid(2.0 * mean * mean / (se * se)) if se > 0.0 else _DF_MAX
    lower_live = mean / _f_ppf_cached(lo_p, live_df, math.inf)
    upper = mean / _f_ppf_cached(1.0 - up_p, live_df, math.inf)
    lower = lower_live if math.isinf(card_df) else mean / _f_ppf_cached(lo_p, live_df, card_df)
    return LossInterval(mean, lower, lower_live, upper, se, live_df, card_df, bw, rho, n, var_df, lo_p)


def diebold_mariano(loss_a: np.ndarray, loss_b: np.ndarray, horizon: int = 1) -> DMResult:
    """One-sided Diebold-Mariano (1995) test with the Harvey, Leybourne and Newbold (1997)
    small-sample factor; H1: mean(loss_a - loss_b) > 0, i.e. b is better.

    The variance of the mean difference is the Newey-West long-run variance with the
    Andrews bandwidth, as everywhere in the project, rather than the h - 1 lags of the
    original paper. A constant difference gives statistic 0 (p 0.5) when it is zero and
    +/-inf (p 0 or 1) otherwise.

    >>> a = np.array([1.0, 2.0, 1.5, 2.5, 2.0, 1.0])
    >>> res = diebold_mariano(a, a - 0.5 + np.array([0.1, -0.1, 0.2, -0.2, 0.0, 0.05]))
    >>> res.statistic > 0 and res.p_value < 0.05
    True
    """
    a = _as_series(loss_a, "loss_a", min_len=2)
    b = _as_series(loss_b, "loss_b", min_len=2)
    if a.size != b.size:
        raise ValueError(f"loss_a has {a.size} values and loss_b {b.size}; pass losses of the same pairs")
    if isinstance(horizon, bool) or int(horizon) != horizon or horizon < 1:
        raise ValueError(f"horizon={horizon!r} must be a whole number >= 1 (forecast steps ahead)")
    h = int(horizon)
    n = a.size
    if h >= n:
        raise ValueError(f"horizon={h} is too long for {n} pairs; it must be below the number of pairs")
    # Equals (n - h)(n + 1 - h) / n^2, positive for h < n.
    factor_sq = (n + 1 - 2 * h + h * (h - 1) / n) / n
    d = a - b
    mean_d = float(d.mean())
    # A spread of d at rounding level of the losses means a constant difference (e.g. one
    # model is the other plus an offset); its variance is zero, not noise of order 1e-17.
    tol = 1e-12 * max(float(np.max(np.abs(a))), float(np.max(np.abs(b))))
    if float(np.ptp(d)) <= tol:
        bw = 0.0
        lrv = 0.0
    else:
        bw = andrews_bandwidth(d)
        lrv = long_run_variance(d, bw)
    if lrv == 0.0:
        stat = 0.0 if abs(mean_d) <= tol else math.copysign(math.inf, mean_d)
    else:
        stat = mean_d / math.sqrt(lrv / n) * math.sqrt(factor_sq)
    if stat == 0.0:
        p = 0.5
    elif math.isinf(stat):
        p = 0.0 if stat > 0 else 1.0
    else:
        p = t_sf(stat, n - 1)
    return DMResult(statistic=stat, p_value=p, mean_difference=mean_d, n=n, bandwidth=bw)


def size_quantile_caches(entries: int) -> None:
    """Re-make the quantile caches (emptied) with room for ``entries`` values each.

    >>> from watchdog_edge.core import stats
    >>> stats.size_quantile_caches(4096); stats._f_ppf_cached.cache_info().maxsize
    4096
    >>> stats.size_quantile_caches(stats._QUANTILE_CACHE_ENTRIES)
    """
    global _t_upper_quantile, _chi2_ppf_cached, _f_ppf_cached
    if entries < 1:
        raise ValueError(f"entries={entries!r} must be at least 1")
    _t_upper_quantile = lru_cache(maxsize=entries)(_t_upper_quantile.__wrapped__)
    _chi2_ppf_cached = lru_cache(maxsize=entries)(_chi2_ppf_cached.__wrapped__)
    _f_ppf_cached = lru_cache(maxsize=entries)(_f_ppf_cached.__wrapped__)

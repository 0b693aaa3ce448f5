"""Tail probabilities of the input checks, against scipy.stats."""

import numpy as np
import pytest
from scipy import stats

from watchdog_edge.core.tails import binomial_limit, chi2_isf, chi2_sf, erlang_isf, erlang_sf


@pytest.mark.parametrize("shape", [1, 2, 6, 40, 100])
def test_erlang_against_scipy_gamma(shape):
    for x in (0.1, 1.0, shape * 0.8, shape * 2.0, shape * 4.0):
        assert erlang_sf(x, shape) == pytest.approx(stats.gamma(shape).sf(x), rel=1e-9, abs=1e-300)
    for p in (0.1, 1e-3, 1e-6):
        assert erlang_isf(p, shape) == pytest.approx(stats.gamma(shape).isf(p), rel=1e-9)


@pytest.mark.parametrize("df", [1, 2, 3, 9, 10, 11, 51, 100])
def test_chi_square_against_scipy(df):
    for x in (0.01, 0.5, df * 1.0, df * 3.0):
        assert chi2_sf(x, df) == pytest.approx(stats.chi2(df).sf(x), rel=1e-9, abs=1e-300)
    for p in (0.05, 1e-4, 1e-7):
        assert chi2_isf(p, df) == pytest.approx(stats.chi2(df).isf(p), rel=1e-9)


@pytest.mark.parametrize(
    "m, q, alpha",
    [(200, 0.01, 1e-6), (200, 0.3, 1e-6), (1000, 1e-4, 1e-6), (20, 0.5, 1e-3), (200, 1e-7, 1e-6), (5000, 0.1, 1e-7)],
)
def test_binomial_limit_is_the_smallest_significant_count(m, q, alpha):
    c = binomial_limit(m, q, alpha)
    # scipy.stats.binom.sf(c - 1) is P(X >= c)
    assert stats.binom(m, q).sf(c - 1) <= alpha < stats.binom(m, q).sf(c - 2)
    assert binomial_limit(m, 0.0, alpha) == 1 and binomial_limit(m, 1.0, alpha) == m + 1


def test_bad_arguments_say_what_is_wrong():
    with pytest.raises(ValueError, match="shape=0"):
        erlang_sf(1.0, 0)
    with pytest.raises(ValueError, match="alpha=0.5"):
        binomial_limit(10, 0.1, 0.5)
    assert np.isfinite(chi2_isf(1e-9, 1))

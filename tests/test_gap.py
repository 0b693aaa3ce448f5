"""The gap check: overfitting shows as a gap from deployment; tolerances, hysteresis, clearing."""

import warnings

import numpy as np
import pytest
from helpers import config
from numpy.polynomial import Polynomial

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.gap import GapCheck, GapSettings
from watchdog_edge.core.events import Alert
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.records import Pair, Prediction, Truth

GAP_ONLY = {"range": {"enabled": False}, "shift": {"enabled": False}, "feed_stop": {"enabled": False}}


def smooth(x):
    return 2.0 / (1.0 + np.exp(-4.0 * (x - 0.5)))


def polynomial_deployment(seed: int, degree: int, n_train: int, n_field: int = 1200, sigma: float = 0.2):
    """Fit a polynomial by least squares, card it with the final prediction error, stream fresh points."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 1, n_train)
    y = smooth(x) + rng.normal(0, sigma, n_train)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = Polynomial.fit(x, y, degree)
    train_mse = float(np.mean((y - fit(x)) ** 2))
    card = ModelCard(
        model_id="m", training={"loss": train_mse, "count": n_train}, fitted_parameters=degree + 1, least_squares=True
    )
    mon = Monitor(config(checks=GAP_ONLY, window={"size_pairs": 500, "min_pairs": 500}), {"m": card})
    xf = rng.uniform(0, 1, n_field)
    yf = smooth(xf) + rng.normal(0, sigma, n_field)
    pf = fit(xf)
    raised = []
    for i in range(n_field):
        mon.feed("m/pred", b'{"id": %d, "value": %r}' % (i, float(pf[i])), 10.0 * i)
        ev = mon.feed("m/truth", b'{"id": %d, "value": %r}' % (i, float(yf[i])), 10.0 * i + 1)
        raised += [e for e in ev if isinstance(e, Alert) and e.state == "raised"]
    return raised


@pytest.mark.slow
def test_overfit_polynomial_raises_gap_from_deployment_and_sensible_fits_do_not():
    # Common practice, no single source: a degree-12 polynomial through 20 noisy points of a
    # smooth function fits the noise and swings between the points; a cubic does not, and a
    # degree-12 fit on 2,000 points has enough data to pin its 13 coefficients.
    # The card uses Akaike's final prediction error, which already inflates the degree-12
    # training loss by (20 + 13) / (20 - 13) = 4.7 times: the field is worse still.
    seeds = range(30)
    overfit = [polynomial_deployment(s, 12, 20) for s in seeds]
    cubic = [polynomial_deployment(s, 3, 20) for s in seeds]
    plenty = [polynomial_deployment(s, 12, 2000) for s in seeds]
    crit = lambda runs: sum(1 for r in runs if any(a.severity == "critical" for a in r))  # noqa: E731
    assert crit(overfit) >= 24  # measured: 27 of 30
    assert all(r[0].figures["diagnosis"] == "present from deployment" for r in overfit if r)
    # A card made from 20 rows is itself uncertain (the training loss has only N - d degrees of
    # freedom), so an honest cubic sometimes shows a modest gap; it is seldom critical.
    assert crit(cubic) <= 6  # measured: 3 of 30
    assert sum(1 for r in plenty if r) == 0


def ctx(expected=1.0, size=100, min_pairs=100):
    card = ModelCard(
        model_id="m",
        training={"loss": expected, "count": 1000},
        fitted_parameters=2,
        holdout={"loss": expected, "count": 500},
    )
    return CheckContext("m", card, "squared", expected, "holdout", window_size=size, min_pairs=min_pairs)


def feed(gap, losses, start=0):
    out = []
    for k, loss in enumerate(losses):
        i = start + k
        gap.on_pair(Pair(Prediction("m", str(i), 0.0, float(i)), Truth("m", str(i), 0.0, float(i)), float(i)), loss)
        v = gap.evaluate(float(i))
        if v is not None:
            out.append(v)
    return out


def test_evaluates_every_k_pairs_once_the_minimum_is_reached():
    # Mean 1.3 is above the warning limit 1.25, but the spread keeps the lower bound below it.
    gap = GapCheck(GapSettings(evaluate_every_pairs=10), ctx(size=100, min_pairs=50))
    verdicts = feed(gap, ([0.3] * 5 + [2.3] * 5) * 12)
    assert len(verdicts) == 8  # at pairs 50, 60, ..., 120
    assert all(v.level == "normal" and v.figures["lower"] < 1.25 < v.figures["live_loss"] for v in verdicts)


def test_a_healthy_window_skips_the_interval_but_keeps_its_figures():
    # While the running mean is under the warning limit the lower bound cannot pass it.
    rng = np.random.default_rng(13)
    gap = GapCheck(GapSettings(evaluate_every_pairs=10), ctx(size=100, min_pairs=50))
    losses = list(rng.exponential(1.0, 120))
    assert feed(gap, losses) == []
    figs = gap.figures()
    assert figs["live_loss"] == pytest.approx(np.mean(losses[-100:]))
    assert figs["lower"] < figs["live_loss"] < figs["upper"] and figs["pairs"] == 100


def test_limits_relative_and_absolute():
    rel = GapCheck(GapSettings(), ctx(expected=2.0))
    assert (rel.warning_limit, rel.critical_limit) == (2.5, 4.0)
    ab = GapCheck(
        GapSettings(tolerance_kind="absolute", warning_tolerance=0.3, critical_tolerance=1.0), ctx(expected=2.0)
    )
    assert (ab.warning_limit, ab.critical_limit) == (2.3, 3.0)
    with pytest.raises(ValueError, match="critical_tolerance"):
        GapSettings(warning_tolerance=0.5, critical_tolerance=0.2)


def test_clearing_needs_k_evaluations_under_the_hysteresis_limit():
    rng = np.random.default_rng(5)
    gap = GapCheck(GapSettings(evaluate_every_pairs=10, clear_after_evaluations=3), ctx(size=100, min_pairs=100))
    up = feed(gap, list(rng.exponential(3.0, 200)))
    assert up[-1].level == "critical"
    down = feed(gap, list(rng.exponential(0.5, 300)), start=200)
    levels = [v.level for v in down]
    first_ok = levels.index("normal")
    # The three evaluations before the clear all had the upper bound under the clearing limit.
    assert all(v.figures["upper"] < gap.clear_limit for v in down[first_ok - 2 : first_ok + 1])
    assert levels[first_ok - 3] != "normal"


def test_diagnosis_distinguishes_degradation_from_a_bad_start():
    rng = np.random.default_rng(6)
    gap = GapCheck(GapSettings(evaluate_every_pairs=10), ctx(size=100, min_pairs=100))
    healthy = feed(gap, list(rng.exponential(1.0, 400)))
    assert all(v.level == "normal" for v in healthy)
    worse = feed(gap, list(rng.exponential(3.0, 200)), start=400)
    raised = next(v for v in worse if v.level != "normal")
    assert raised.figures["diagnosis"] == "appeared after a healthy period"
    assert "degraded" in raised.summary

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
    plenty = [polynomial_deployment(s, 12, 2000) for s in seeds]
    crit = lambda runs: sum(1 for r in runs if any(a.severity == "critical" for a in r))  # noqa: E731
    # The 20-row card has only 20 - 13 = 7 degrees of freedom, so the limit allows for a card
    # that is itself far off (item 8); the overfit fit is still raised in most deployments.
    # Measured: 21 of 30 (19 critical); 23 (21) before the lower bound was held at 95 % over a
    # window span rather than per evaluation.
    assert sum(1 for r in overfit if r) >= 20
    assert crit(overfit) >= 18
    assert all(r[0].figures["diagnosis"] == "present from deployment" for r in overfit if r)
    assert sum(1 for r in plenty if r) == 0


def test_a_fair_cubic_on_a_small_card_stays_quiet():
    # A training loss from N rows and d = 4 parameters has N - d degrees of freedom: from 20
    # rows it is easily 30 % off, and before the limit allowed for that a fair cubic showed a
    # "gap" in a good share of deployments (measured before: 25, 16 and 17 of 60 at N = 20,
    # 25 and 30). Now the lower bound is widened by the F law of the two mean squares.
    # Measured: 0, 0 and 0 of 30; 2, 0 and 0 while the 95 % one-sided bound held per look
    # rather than over a window span (it is looked at 70 times a deployment), and a cubic on
    # 20 points of this curve is only nearly fair.
    for n_train, allowed in [(20, 3), (25, 1), (30, 1)]:
        runs = [polynomial_deployment(s, 3, n_train) for s in range(30)]
        assert sum(1 for r in runs if r) <= allowed, n_train
        assert not any(a.severity == "critical" for r in runs for a in r)


def test_the_card_share_of_the_limit_is_in_the_figures():
    # External check: scipy.stats.f.ppf gives the live mean at which the interval raises,
    # warning limit x F_p(live df, card df) at the lower bound's level p; with an infinite card
    # it is chi2 / df. p is the one-look level (scipy: b phi(b) = 0.05) after the Student
    # correction for the variance's degrees of freedom (scipy's t and normal).
    from scipy import optimize
    from scipy import stats as sps

    rng = np.random.default_rng(3)
    card = ModelCard(model_id="m", training={"loss": 1.0, "count": 30}, fitted_parameters=4, least_squares=True)
    context = CheckContext("m", card, "squared", 1.0, "fpe", window_size=200, min_pairs=200)
    gap = GapCheck(GapSettings(evaluate_every_pairs=200), context)
    assert gap.card_df == 26.0
    [v] = feed(gap, list(3.0 * rng.chisquare(1, 200)))
    f = v.figures
    assert f["card_df"] == 26.0
    b = optimize.brentq(lambda b: b * sps.norm.pdf(b) - 0.05, 1.0, 10.0)
    assert f["raise_confidence"] == pytest.approx(float(sps.norm.cdf(b)), rel=1e-9)
    level = float(sps.norm.cdf(sps.t.ppf(f["raise_confidence"], f["variance_df"])))
    assert f["lower_level"] == pytest.approx(level, rel=1e-9)
    factor = float(sps.f.ppf(level, f["live_df"], 26.0))
    assert f["raise_above_live_loss"] == pytest.approx(1.25 * factor, rel=1e-7)
    live = float(sps.chi2.ppf(level, f["live_df"])) / f["live_df"]
    assert f["card_share_of_margin"] == pytest.approx((factor - live) / (factor - 1.0), rel=1e-6)
    assert f["lower"] == pytest.approx(f["live_loss"] / factor, rel=1e-7)
    assert f["lower"] < f["lower_live_only"] < f["live_loss"] < f["upper"]
    assert 0.5 < f["card_share_of_margin"] < 1.0  # from 26 degrees of freedom the card dominates
    # Switched off, the bound is the live one alone.
    plain = GapCheck(GapSettings(evaluate_every_pairs=200, card_uncertainty=False), context)
    [w] = feed(plain, list(3.0 * np.random.default_rng(3).chisquare(1, 200)))
    assert w.figures["card_df"] is None and w.figures["lower"] == w.figures["lower_live_only"]


def burst_stream(rng, phi, block, times, before=1000, after=700):
    """Errors with expected squared error 1 (independent, or AR(1) with coefficient phi), and a
    block of gross errors of about sqrt(times) on top: losses about ``times`` x expected."""
    n = before + block + after
    u = rng.normal(size=n) * np.sqrt(1 - phi**2)
    e = np.empty(n)
    e[0] = rng.normal()
    for t in range(1, n):
        e[t] = phi * e[t - 1] + u[t]
    gross = rng.choice([-1.0, 1.0], block) * np.sqrt(times) * (1 + 0.2 * rng.normal(size=block))
    e[before : before + block] += gross
    return e * e


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.9])
def test_a_burst_of_gross_errors_is_raised_at_once_and_held_while_the_live_loss_is_over(phi):
    # Issue 10 item 0: a burst inflated the long-run variance until the lower bound went below
    # zero, and gap never raised. Blocks of 10 to 30 pairs at 50 to 10,000 times the expected
    # loss, on independent and AR(1) errors.
    rng = np.random.default_rng(int(phi * 10) + 40)
    for block in (10, 30):
        for times in (50.0, 1000.0, 10_000.0):
            gap = GapCheck(GapSettings(), ctx(size=500, min_pairs=100))
            losses = burst_stream(rng, phi, block, times)
            raised_at = None
            for i, loss in enumerate(losses):
                feed(gap, [loss], start=i)
                level = gap.figures()["level"]
                if raised_at is None and level != "normal":
                    raised_at = i
                if raised_at is not None and gap.live_mean() > gap.warning_limit:
                    assert level != "normal", (block, times, i)
                if gap.figures().get("lower") is not None:
                    assert gap.figures()["lower"] >= 0.0
            assert raised_at is not None and 1000 <= raised_at <= 1000 + 10, (block, times, raised_at)


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


def test_a_long_bad_spell_clears_once_the_loss_is_back_the_cusum_does_not_hold_it():
    # Squared errors of sd 3 for 200 pairs pile up the CUSUM (about +1 a pair); once errors of
    # sd 0.5 have filled the window the interval says the loss is well under the limit, and the
    # episode must close then, not when the sum has drained (about 5 pairs per pair of the spell).
    rng = np.random.default_rng(11)
    gap = GapCheck(GapSettings(evaluate_every_pairs=5), ctx(size=60, min_pairs=40))
    up = feed(gap, list(rng.normal(0.0, 3.0, 200) ** 2))
    assert up[-1].level == "critical"
    down = feed(gap, list(rng.normal(0.0, 0.5, 150) ** 2), start=200)
    cleared = next(k for k, v in enumerate(down) if v.level == "normal")
    assert 5 * cleared <= 100, [v.level for v in down]  # within 100 pairs of the loss coming back
    assert down[cleared].figures["upper"] < gap.warning_limit


def test_diagnosis_distinguishes_degradation_from_a_bad_start():
    rng = np.random.default_rng(6)
    gap = GapCheck(GapSettings(evaluate_every_pairs=10), ctx(size=100, min_pairs=100))
    healthy = feed(gap, list(rng.exponential(1.0, 400)))
    assert all(v.level == "normal" for v in healthy)
    worse = feed(gap, list(rng.exponential(3.0, 200)), start=400)
    raised = next(v for v in worse if v.level != "normal")
    assert raised.figures["diagnosis"] == "appeared after a healthy period"
    assert "degraded" in raised.summary


def test_snapshot_mid_burst_restores_the_gross_error_run():
    import json

    rng = np.random.default_rng(8)
    losses = list(burst_stream(rng, 0.5, 20, 300.0, before=600, after=300))
    live = GapCheck(GapSettings(), ctx(size=500, min_pairs=100))
    feed(live, losses[:603])  # three pairs into the burst: not yet raised
    assert live.figures()["level"] == "normal"
    copy = GapCheck(GapSettings(), ctx(size=500, min_pairs=100))
    copy.restore(json.loads(json.dumps(live.snapshot())))
    a = feed(live, losses[603:], start=603)
    b = feed(copy, losses[603:], start=603)
    assert a == b and a[0].level != "normal" and a[0].figures["raised_by"] == "gross errors"
    assert "of the latest 10 squared errors are over" in a[0].summary


@pytest.mark.parametrize("phi", [0.0, 0.9])
def test_the_field_dropout_then_a_lasting_rise_is_raised_and_held(phi):
    # The field case of issue 10: a dropout (15 pairs with errors 80 times the usual size), then
    # a lasting rise of the loss to 4 times the expected. gap stayed silent there (bounds
    # -64 .. 348); now it raises within 10 pairs of the dropout and never clears.
    from scipy.signal import lfilter

    rng = np.random.default_rng(1)
    e = lfilter([1.0], [1.0, -phi], rng.normal(size=3000)) * np.sqrt(1 - phi * phi)
    e[1000:1015] *= 80.0
    e[1500:] *= 2.0
    gap = GapCheck(GapSettings(), ctx(size=500, min_pairs=100))
    levels = []
    for i, loss in enumerate(e * e):
        feed(gap, [float(loss)], start=i)
        levels.append(gap.figures()["level"])
    assert all(lv == "normal" for lv in levels[:1000])
    assert all(lv != "normal" for lv in levels[1010:])
    f = gap.figures()
    assert f["level"] == "critical" and 0.0 < f["lower"] and f["lower"] > gap.critical_limit


def test_a_fair_model_on_persistent_errors_stays_quiet_over_a_million_pairs():
    # Issue 10: the lower bound is looked at every 10 pairs on an overlapping window, so a 95 %
    # bound per look is crossed by chance far more often than 5 % of the time, and most often
    # where the effective sample is small (AR(1) 0.9: about 50 of the window's 500 pairs).
    # Measured on these ten streams of 100,000 pairs before the lower bound was held at 95 %
    # over a window span, with a Student correction for the variance's own noise: 11 false
    # raises; now none.
    from scipy.signal import lfilter

    card = ModelCard(
        model_id="m", training={"loss": 1.0, "count": 5000}, fitted_parameters=5, holdout={"loss": 1.0, "count": 2000}
    )
    context = CheckContext("m", card, "squared", 1.0, "holdout", window_size=500, min_pairs=100)
    raised = 0
    for seed in range(10):
        gap = GapCheck(GapSettings(), context)
        e = lfilter([1.0], [1.0, -0.9], np.random.default_rng(seed).normal(size=100_000)) * np.sqrt(1 - 0.81)
        level = "normal"
        for i, loss in enumerate((e * e).tolist()):
            if gap.on_pair(PAIR, loss):
                v = gap.evaluate(float(i))
                if v is not None:
                    raised += level == "normal" and v.level != "normal"
                    level = v.level
    assert raised == 0


PAIR = Pair(Prediction("m", "0", 0.0, 0.0), Truth("m", "0", 0.0, 0.0), 0.0)


def test_gross_errors_allow_for_a_small_card():
    # A card from 12 rows and 3 parameters (9 degrees of freedom) can be low by a factor of 4
    # by chance; a run of gross errors over a live mean within that factor is the card's noise,
    # not proof of a gap (the bench's 30-row, 20-feature card raised this way). A live mean
    # beyond it is raised by the gross errors at once.
    from scipy import stats as sps

    card = ModelCard(model_id="m", training={"loss": 0.75, "count": 12}, fitted_parameters=3, least_squares=True)
    context = CheckContext("m", card, "squared", 1.0, "fpe", window_size=200, min_pairs=100)
    gap = GapCheck(GapSettings(), context)
    # External check: the card's one-sided factor is df / chi2_(1 - level)(df), scipy's chi2.
    assert gap.card_factor == pytest.approx(9.0 / sps.chi2.ppf(1 - gap.raise_confidence, 9), rel=1e-9)
    rng = np.random.default_rng(2)
    for live, expect in ((3.0, "normal"), (5.0, "warning")):
        gap = GapCheck(GapSettings(), context)
        losses = list(live * rng.chisquare(1, 150)) + [30.0] * 6  # six gross errors (over 1.25 x 20)
        levels = [v.level for v in feed(gap, losses)]
        f = gap.figures()
        assert levels[-1] == expect, (live, f["live_loss"], gap.card_factor)
        assert (f["live_loss"] > 1.25 * gap.card_factor) == (expect != "normal")
        if expect != "normal":
            assert f["raised_by"] == "gross errors" and levels[-2] == "normal"


def test_the_lower_bound_per_evaluation_is_still_available():
    # confidence_span = "evaluation" looks at each evaluation alone (the rule before issue 10):
    # it raises sooner on a real rise, at the price of false raises on persistent errors.
    window = GapCheck(GapSettings(), ctx(size=500, min_pairs=100))
    each = GapCheck(GapSettings(confidence_span="evaluation"), ctx(size=500, min_pairs=100))
    assert each.raise_confidence == 0.95 and window.raise_confidence > 0.99
    rng = np.random.default_rng(11)
    losses = list(rng.chisquare(1, 600)) + list(2.0 * rng.chisquare(1, 600))
    first = {}
    for name, gap in (("window", window), ("each", each)):
        first[name] = next(i for i, v in enumerate(feed(gap, losses)) if v.level != "normal")
    assert first["each"] < first["window"]


def test_the_cusum_is_the_likelihood_ratio_of_squared_gaussian_errors_and_holds_its_false_alarm_rate():
    # External check: each pair adds ln f_s1(loss) - ln f_s0(loss), f_s the density of s x a
    # chi-square(1) (scipy), s1 the critical and s0 the warning limit times the card's factor.
    from scipy import stats as sps

    gap = GapCheck(GapSettings(), ctx(size=500, min_pairs=100))
    s0, s1 = gap.warning_limit * gap.card_factor, gap.critical_limit * gap.card_factor
    for x in (0.1, 1.0, 3.0, 10.0):
        llr = sps.chi2.logpdf(x / s1, 1) - np.log(s1) - sps.chi2.logpdf(x / s0, 1) + np.log(s0)
        assert gap._cusum_a * x - gap._cusum_c == pytest.approx(llr, rel=1e-9)
    assert gap.cusum_threshold == pytest.approx(np.log(500 / 0.05))
    # Simulation: at exactly s0, independent losses, the CUSUM (restarted after each alarm) has
    # a mean time to a false alarm of at least e^h = 10,000 pairs (Lorden 1971): at most 20
    # alarms in 200,000 pairs (measured: 0; the bound is loose, the drift at s0 is negative).
    x = s0 * np.random.default_rng(12).chisquare(1, 200_000)
    s, alarms = 0.0, 0
    for v in (gap._cusum_a * x - gap._cusum_c).tolist():
        s = max(0.0, s + v)
        if s > gap.cusum_threshold:
            alarms, s = alarms + 1, 0.0
    assert alarms <= 20


def test_the_cusum_raises_a_doubling_sooner_than_the_interval_alone():
    # Measured on these ten doublings: the CUSUM first in 8 (by 10 to 120 pairs), the interval
    # in the other 2 (both then at the same pair).
    card = ModelCard(
        model_id="m", training={"loss": 1.0, "count": 5000}, fitted_parameters=5, holdout={"loss": 1.0, "count": 3000}
    )
    context = CheckContext("m", card, "squared", 1.0, "holdout", window_size=500, min_pairs=100)
    sooner = 0
    for seed in range(10):
        rng = np.random.default_rng(seed)
        losses = list(rng.chisquare(1, 1000)) + list(2.0 * rng.chisquare(1, 1000))
        first, by = {}, {}
        for on in (True, False):
            gap = GapCheck(GapSettings(cusum=on), context)
            for i, loss in enumerate(losses):
                [v] = feed(gap, [loss], start=i) or [None]
                if v is not None and v.level != "normal":
                    first[on], by[on] = i, v.figures["raised_by"]
                    if by[on] == "CUSUM":
                        assert v.summary.startswith("The CUSUM of squared errors") and v.figures["cusum"] > 0
                    break
        assert 1000 <= first[True] <= first[False]
        sooner += first[True] < first[False] and by[True] == "CUSUM"
    assert sooner >= 5


def _first_raise(gap: GapCheck, losses: list[float]):
    for i, loss in enumerate(losses):
        [v] = feed(gap, [loss], start=i) or [None]
        if v is not None and v.level != "normal":
            return i, v
    return None, None


def test_the_cusum_threshold_is_measured_at_rest_so_a_rise_does_not_raise_it():
    # A step of independent squared Gaussian errors from the expected loss to 2.5 x: the
    # threshold in force when the CUSUM raises is kappa x ln(ARL) with kappa from windows
    # before the rise (about 1.1 here). Measured on the window that straddles the rise, the
    # step reads as persistence and kappa came out at 1.3 to 2 (the old behaviour): the rise
    # was raised 10 to 60 pairs later.
    card = ModelCard(
        model_id="m", training={"loss": 1.0, "count": 5000}, fitted_parameters=5, holdout={"loss": 1.0, "count": 3000}
    )
    context = CheckContext("m", card, "squared", 1.0, "holdout", window_size=500, min_pairs=100)
    for seed in range(5):
        rng = np.random.default_rng(100 + seed)
        losses = list(rng.chisquare(1, 1500)) + list(2.5 * rng.chisquare(1, 500))
        gap = GapCheck(GapSettings(), context)
        i, v = _first_raise(gap, losses)
        assert i is not None and i >= 1500 and v.figures["raised_by"] == "CUSUM"
        assert v.figures["cusum_threshold"] <= 1.25 * gap.cusum_threshold
        assert i - 1500 <= 120  # the CUSUM's drift at 2.5 x is 0.12 a pair: 9.2 x 1.1 / 0.12 = 85 on average


def test_a_single_glitch_does_not_raise_through_the_cusum():
    # One loss 1,000 times the expected (a sensor glitch) in a healthy stream: the CUSUM counts
    # it at the gross-error threshold, so it adds at most 3.5 against a threshold of about 10:
    # no raise. A burst of them is raised (by the CUSUM or the gross-error test, 5 in 10).
    rng = np.random.default_rng(21)
    healthy = list(rng.chisquare(1, 1200))
    glitch = healthy[:800] + [1000.0] + healthy[800:]
    assert _first_raise(GapCheck(GapSettings(), ctx(size=500, min_pairs=100)), glitch) == (None, None)
    burst = healthy[:800] + [1000.0] * 5 + healthy[800:]
    i, v = _first_raise(GapCheck(GapSettings(), ctx(size=500, min_pairs=100)), burst)
    assert i is not None and 800 <= i <= 804


def test_a_restored_check_keeps_kappa_and_raises_where_the_uninterrupted_one_does():
    # The agent restarts from its snapshot: kappa, measured at rest before the restart, and the
    # CUSUM carry over (through JSON, as the store keeps them), so the rise after it is raised
    # at the same pair with the same figures.
    import json

    card = ModelCard(
        model_id="m", training={"loss": 1.0, "count": 5000}, fitted_parameters=5, holdout={"loss": 1.0, "count": 3000}
    )
    context = CheckContext("m", card, "squared", 1.0, "holdout", window_size=500, min_pairs=100)
    rng = np.random.default_rng(31)
    losses = list(rng.chisquare(1, 1500)) + list(2.5 * rng.chisquare(1, 500))
    whole = GapCheck(GapSettings(), context)
    i_whole, v_whole = _first_raise(whole, losses)
    first = GapCheck(GapSettings(), context)
    assert _first_raise(first, losses[:1520]) == (None, None)
    assert first.snapshot()["kappa_age"] >= 0  # measured at rest before the restart
    second = GapCheck(GapSettings(), context)
    second.restore(json.loads(json.dumps(first.snapshot())))
    assert second._kappa == first._kappa
    for k, loss in enumerate(losses[1520:]):
        [v] = feed(second, [loss], start=1520 + k) or [None]
        if v is not None and v.level != "normal":
            assert (1520 + k, v.figures) == (i_whole, v_whole.figures)
            break
    else:
        raise AssertionError("the restored check never raised")

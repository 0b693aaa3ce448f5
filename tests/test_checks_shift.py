"""``shift``: population stability index per feature against the card's training histogram."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from pydantic import ValidationError
from scipy import stats as sps

from watchdog_edge.core.cards import ModelCard, format_validation
from watchdog_edge.core.checks import settings_class
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.shift import (
    ShiftCheck,
    ShiftSettings,
    population_stability_index,
    settings_warnings,
)
from watchdog_edge.core.records import Prediction

TRAIN_ROWS = 10_000


def training_card(rng: np.random.Generator, bins: int = 10) -> ModelCard:
    """A card whose histograms are the deciles of a training sample (edges from its quantiles)."""
    feats = {}
    for name, sample in (("pressure", rng.normal(5.0, 1.0, TRAIN_ROWS)), ("speed", rng.gamma(2.0, 3.0, TRAIN_ROWS))):
        edges = np.quantile(sample, np.linspace(0, 1, bins + 1))
        inner = edges[1:-1]
        idx = np.searchsorted(inner, sample, side="right")
        shares = np.bincount(idx, minlength=bins) / TRAIN_ROWS
        feats[name] = {
            "min": float(sample.min()),
            "max": float(sample.max()),
            "histogram": {"edges": edges.tolist(), "shares": shares.tolist()},
        }
    return ModelCard(
        model_id="press",
        training={"loss": 1.0, "count": TRAIN_ROWS},
        fitted_parameters=3,
        holdout={"loss": 1.0, "count": 500},
        features=feats,
    )


def make_check(card: ModelCard, **settings) -> ShiftCheck:
    return ShiftCheck(ShiftSettings(**settings), CheckContext("press", card, "squared", 1.0, "holdout"))


def feed(check: ShiftCheck, pressure, speed, start: int = 0) -> list:
    out = []
    for i, (p, s) in enumerate(zip(pressure, speed), start):
        check.on_prediction(Prediction("press", str(i), 0.0, float(i), features={"pressure": p, "speed": s}))
        v = check.evaluate(float(i))
        if v is not None:
            out.append(v)
    return out


def test_worked_example_by_hand():
    # Expected shares 10/20/40/20/10 %, observed 20/20/30/20/10 of 100, no smoothing:
    #   (0.2 - 0.1) ln(0.2/0.1) = 0.1 x 0.693147 = 0.0693147
    #   (0.3 - 0.4) ln(0.3/0.4) = 0.1 x 0.287682 = 0.0287682
    #   the three equal bins add 0;  PSI = 0.0980829
    assert population_stability_index([0.1, 0.2, 0.4, 0.2, 0.1], [20, 20, 30, 20, 10], 0.0) == pytest.approx(
        0.0980829, abs=1e-7
    )
    # With smoothing 0.5 and an empty bin: expected 50/50 %, observed 10 and 0 (n = 10, 2 bins):
    #   a = (10.5/11, 0.5/11) = (0.954545, 0.045455);  e = (5.5/11, 5.5/11) = (0.5, 0.5)
    #   0.454545 ln(1.909091) + 0.454545 ln(11) = 0.293921 + 1.089952 = 1.383873
    assert population_stability_index([0.5, 0.5], [10, 0], 0.5) == pytest.approx(1.383873, abs=1e-6)
    # Without smoothing an empty bin makes the index infinite.
    assert population_stability_index([0.5, 0.5], [10, 0], 0.0) == math.inf


def test_index_is_the_symmetric_kullback_leibler_divergence():
    # PSI = KL(a || e) + KL(e || a) (Jeffreys divergence); scipy.stats.entropy computes KL.
    rng = np.random.default_rng(3)
    for _ in range(20):
        e = rng.dirichlet(np.ones(8))
        c = rng.integers(0, 60, 8)
        s = 0.5
        n = c.sum()
        a_sm = (c + s) / (n + 8 * s)
        e_sm = (e * n + s) / (n + 8 * s)
        ref = sps.entropy(a_sm, e_sm) + sps.entropy(e_sm, a_sm)
        assert population_stability_index(e.tolist(), c.tolist(), s) == pytest.approx(ref, rel=1e-10)


def test_bins_follow_the_card_edges_with_open_outer_bins():
    card = ModelCard(
        model_id="press",
        training={"loss": 1.0, "count": 10},
        fitted_parameters=1,
        holdout={"loss": 1.0, "count": 10},
        features={
            "pressure": {
                "min": 0,
                "max": 3,
                "histogram": {"edges": [0.0, 1.0, 2.0, 3.0], "shares": [0.3, 0.4, 0.3], "missing": 0.1},
            }
        },
    )
    check = make_check(card, recent_predictions=50, evaluate_every_predictions=50)
    values = [-100.0, 0.0, 0.99, 1.0, 1.5, 2.0, 2.999, 3.0, 1e6, None] * 5
    feed(check, values, [1.0] * 50)
    counts = check.counts()["pressure"]
    # Bins by hand: [-inf, 1) holds -100, 0, 0.99; [1, 2) holds 1, 1.5; [2, inf) holds 2,
    # 2.999, 3, 1e6 (the last bin is open); None goes to the missing bin. Five copies of each.
    assert counts == [15, 10, 20, 5]
    # The expected side spreads the present share over the bins and keeps the missing share:
    # 0.3 x 0.9, 0.4 x 0.9, 0.3 x 0.9 and 0.1; the index is the pure function on those.
    idx = check.indices()["pressure"]
    assert idx == pytest.approx(population_stability_index([0.27, 0.36, 0.27, 0.1], counts, 0.5))


def test_false_alert_rate_on_unshifted_data_at_the_default_window_is_below_one_percent():
    rng = np.random.default_rng(11)
    card = training_card(rng)
    settings = ShiftSettings()
    assert settings.recent_predictions == 1000
    windows = 300
    check = make_check(card, evaluate_every_predictions=settings.recent_predictions)  # disjoint windows
    n = windows * settings.recent_predictions
    verdicts = feed(check, rng.normal(5.0, 1.0, n).tolist(), rng.gamma(2.0, 3.0, n).tolist())
    assert len(verdicts) == windows
    alerts = sum(v.level != "normal" for v in verdicts)
    assert alerts / windows < 0.01
    # The bias the module docstring states: n x PSI is about chi-square with (bins - 1) degrees
    # of freedom (Pearson's statistic), inflated by the training sample's own noise, so the mean
    # index is about (bins - 1) (1/n + 1/N). Chi-square approximation from memory; scipy gives
    # the 99.9% quantile to bound the worst window.
    idx = np.array([v.figures["index"]["pressure"] for v in verdicts])
    scale = 1 / settings.recent_predictions + 1 / TRAIN_ROWS
    assert idx.mean() == pytest.approx(9 * scale, rel=0.15)
    assert idx.max() < sps.chi2.ppf(0.999, 9) * scale * 1.3
    assert idx.max() < settings.warning_index / 3


def test_a_shifted_feature_raises_and_is_named():
    rng = np.random.default_rng(5)
    card = training_card(rng)
    check = make_check(card, evaluate_every_predictions=250)
    calm = feed(check, rng.normal(5.0, 1.0, 2000).tolist(), rng.gamma(2.0, 3.0, 2000).tolist())
    assert {v.level for v in calm} == {"normal"}
    # Pressure moves up by half a standard deviation; speed is unchanged.
    moved = feed(check, rng.normal(5.5, 1.0, 2000).tolist(), rng.gamma(2.0, 3.0, 2000).tolist(), start=2000)
    assert moved[-1].level != "normal"
    figs = moved[-1].figures
    assert figs["top_feature"] == "pressure"
    assert figs["index"]["pressure"] > 0.1 > figs["index"]["speed"]
    assert "pressure" in moved[-1].summary
    json.dumps(figs)
    # A full standard deviation is critical.
    far = feed(check, rng.normal(6.0, 1.0, 1000).tolist(), rng.gamma(2.0, 3.0, 1000).tolist(), start=4000)
    assert far[-1].level == "critical"


def test_a_feature_that_goes_missing_raises():
    rng = np.random.default_rng(9)
    card = training_card(rng)
    check = make_check(card, evaluate_every_predictions=1000)
    [v] = feed(check, [None] * 1000, rng.gamma(2.0, 3.0, 1000).tolist())
    assert v.level == "critical" and v.figures["top_feature"] == "pressure"


def test_snapshot_restore_mid_stream_gives_identical_verdicts():
    rng = np.random.default_rng(21)
    card = training_card(rng)
    p = np.r_[rng.normal(5.0, 1.0, 1500), rng.normal(5.4, 1.2, 1500)].tolist()
    s = rng.gamma(2.0, 3.0, 3000).tolist()
    live = make_check(card, evaluate_every_predictions=90)
    feed(live, p[:1300], s[:1300])
    copy = make_check(card, evaluate_every_predictions=90)
    copy.restore(json.loads(json.dumps(live.snapshot())))
    a = feed(live, p[1300:], s[1300:], start=1300)
    b = feed(copy, p[1300:], s[1300:], start=1300)
    assert a == b and any(v.level != "normal" for v in a)


def test_small_windows_are_warned_about_and_bad_settings_explained():
    assert settings_class("shift") is ShiftSettings
    assert settings_warnings(ShiftSettings()) == []
    [w] = settings_warnings(ShiftSettings(recent_predictions=200))  # shorter than the short window: off
    assert "recent_predictions = 200" in w and "1000" in w
    # a window of 600 leaves one older block of 250: nothing for the homogeneity test to compare
    w1, w2 = settings_warnings(ShiftSettings(recent_predictions=600))
    assert "fewer than two older blocks" in w1 and "recent_predictions >= 750" in w1 and "below 1000" in w2
    # a short window looked at only every 250 predictions sees a move up to 250 late
    [w] = settings_warnings(ShiftSettings(short_window_every_predictions=250))
    assert "every 250 predictions" in w and "short_window_every_predictions to about 50" in w
    assert settings_warnings(ShiftSettings(short_window_predictions=0)) == []
    with pytest.raises(ValidationError) as e:
        ShiftSettings(short_window_features="continuous")
    assert "short_window_features" in format_validation(e.value)
    with pytest.raises(ValidationError) as e:
        ShiftSettings(warning_index=0.3, critical_index=0.2)
    assert "critical_index (0.2) must be >= warning_index (0.3)" in format_validation(e.value)
    with pytest.raises(ValidationError) as e:
        ShiftSettings(smoothing=0)
    assert "smoothing = 0" in format_validation(e.value)


def test_check_config_prints_the_small_window_warning():
    from watchdog_edge.core.settings import config_warnings, parse_config

    cfg = parse_config(
        {
            "models": [
                {
                    "id": "press",
                    "card": "press.json",
                    "prediction_topic": "p/pred",
                    "truth_topic": "p/truth",
                    "checks": {"shift": {"recent_predictions": 400}},
                }
            ]
        }
    )
    w1, w2 = config_warnings(cfg)
    # 400 also leaves one older block of 250 for the short window's homogeneity test
    assert w1.startswith("models[press].checks.shift: recent_predictions = 400 leaves fewer than two older blocks")
    assert w2.startswith("models[press].checks.shift: recent_predictions = 400 is below 1000")


def test_a_discrete_feature_moving_from_45_to_100_percent_is_raised():
    # Regression: a 0/1 feature got one histogram bin at card build (its quantile edges merge),
    # so 45 % -> 100 % of one value raised nothing over 1,500 predictions.
    from watchdog_edge.files.cardbuild import card_from_arrays

    rng = np.random.default_rng(21)
    for n in (300, 3000):
        switch = (rng.uniform(size=n) < 0.45).astype(float)
        y = rng.normal(size=n)
        card = card_from_arrays(model_id="m", x={"switch": switch}, y=y, yhat=y, params=2)
        check = ShiftCheck(ShiftSettings(), CheckContext("m", card, "squared", 1.0, "holdout"))
        levels = []
        for i in range(3000):
            on = float(rng.uniform() < 0.45) if i < 1500 else 1.0
            check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"switch": on}))
            v = check.evaluate(float(i))
            if v is not None:
                levels.append((i, v.level))
        assert all(level == "normal" for i, level in levels if i < 1500)
        assert any(level == "critical" for i, level in levels if i < 2500)  # within a window of the change
        # a value the card never saw lands in the "other" bin
        assert check.counts()["switch"] == [0, 1000, 0, 0]


def test_small_cards_raise_the_limits_so_fair_inputs_stay_quiet():
    # A card's histogram from n rows is itself an estimate: with 30 rows and 10 bins the index of
    # fair inputs averages about 9/30 = 0.3, above the critical 0.25. The limits are raised by
    # the two-sample chi-square bound. Fair inputs stay quiet; a large move is still raised.
    from watchdog_edge.files.cardbuild import card_from_arrays

    rng = np.random.default_rng(22)
    for n in (30, 300, 3000):
        for d in (1, 5):
            x = {f"f{j}": rng.normal(size=n) for j in range(d)}
            x["mode"] = rng.choice([0.0, 1.0, 2.0], size=n, p=[0.3, 0.3, 0.4])
            y = rng.normal(size=n)
            card = card_from_arrays(model_id="m", x=x, y=y, yhat=y, params=2)
            check = ShiftCheck(ShiftSettings(), CheckContext("m", card, "squared", 1.0, "holdout"))
            if n == 30:
                assert min(check.factors.values()) > 1
            levels = []
            for i in range(5000):
                feats = {f"f{j}": float(rng.normal()) for j in range(d)}
                feats["mode"] = float(rng.choice([0.0, 1.0, 2.0], p=[0.3, 0.3, 0.4]))
                check.on_prediction(Prediction("m", str(i), 0.0, float(i), features=feats))
                v = check.evaluate(float(i))
                if v is not None:
                    levels.append(v.level)
            assert set(levels) == {"normal"}, (n, d)
            figs = check.figures()
            assert figs["warning_limits"]["mode"] >= 0.1
            # the inputs move by three standard deviations: raised even from 30 rows
            for i in range(1000):
                feats = {f"f{j}": float(rng.normal(3.0)) for j in range(d)}
                feats["mode"] = 0.0
                check.on_prediction(Prediction("m", str(i), 0.0, float(i), features=feats))
                check.evaluate(float(i))
            assert check.figures()["level"] == "critical", (n, d)


def test_a_large_move_is_seen_on_the_recent_part_of_the_window():
    # 45 % -> 75 % of ones: over the whole window of 1,000 the index passes 0.1 only once about
    # half the window has moved; over the latest 250 it passes its own (higher) limit sooner.
    from watchdog_edge.files.cardbuild import card_from_arrays

    rng = np.random.default_rng(23)
    n = 3000
    switch = (rng.uniform(size=n) < 0.45).astype(float)
    y = rng.normal(size=n)
    card = card_from_arrays(model_id="m", x={"switch": switch}, y=y, yhat=y, params=2)
    delays = {}
    assert ShiftSettings().short_window_predictions == 250  # on by default for discrete features
    assert ShiftSettings().short_window_every_predictions == 50
    for recent in (0, 250):
        check = ShiftCheck(
            ShiftSettings(short_window_predictions=recent),
            CheckContext("m", card, "squared", 1.0, "holdout"),
        )
        stream = np.concatenate([rng.uniform(size=2000) < 0.45, rng.uniform(size=2000) < 0.75]).astype(float)
        for i, on in enumerate(stream.tolist()):
            check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"switch": on}))
            v = check.evaluate(float(i))
            if v is not None and v.level != "normal":
                delays[recent] = i - 2000
                break
        if recent:
            # the recent index is the index of the latest 250 values, counted here with numpy
            last = stream[i - 249 : i + 1]
            counts = [int((last == 0).sum()), int((last == 1).sum()), 0, 0]
            e = card.features["switch"].histogram.shares + [0.0, 0.0]
            a = (np.array(counts) + 0.5) / (250 + 2.0)
            q = (np.array(e) * 250 + 0.5) / (250 + 2.0)
            assert v.figures["short_window_index"]["switch"] == pytest.approx(float(np.sum((a - q) * np.log(a / q))))
    assert delays[250] < 300 < delays[0]


def test_nulls_and_absent_features_go_to_the_missing_bin_of_their_own_feature_only():
    hist = {"edges": [0.0, 1.0, 2.0], "shares": [0.5, 0.5], "missing": 0.0}
    card = ModelCard(
        model_id="press",
        training={"loss": 1.0, "count": 10},
        fitted_parameters=1,
        holdout={"loss": 1.0, "count": 10},
        features={n: {"min": 0, "max": 2, "histogram": hist} for n in ("pressure", "speed")},
    )
    check = make_check(card, recent_predictions=50, evaluate_every_predictions=50)
    rows = [{"pressure": None, "speed": 0.5}, {"speed": 1.5}, {"pressure": 1.5, "speed": None}, {"pressure": 0.2}]
    for i, feats in enumerate(rows):
        check.on_prediction(Prediction("press", str(i), 0.0, float(i), features=feats))
    # by hand: pressure None, absent, 1.5, 0.2 -> bins [1, 1, 0] with two missing;
    # speed 0.5, 1.5, None, absent -> [1, 1] with two missing
    assert check.counts() == {"pressure": [1, 1, 2], "speed": [1, 1, 2]}


def switch_and_pressure_card(rng: np.random.Generator, n: int = 3000) -> ModelCard:
    """A card built by ``card build``'s own code: a 0/1 switch on 45 % of rows (one bin per
    value) and a continuous pressure (quantile bins)."""
    from watchdog_edge.files.cardbuild import card_from_arrays

    x = {"switch": (rng.uniform(size=n) < 0.45).astype(float), "pressure": rng.normal(5.0, 1.0, n)}
    y = rng.normal(size=n)
    return card_from_arrays(model_id="m", x=x, y=y, yhat=y, params=2)


def test_the_short_window_can_watch_the_discrete_features_only():
    # With short_window_features = "discrete" the latest 250 predictions are looked at for the
    # switch (one bin per value) but not for the continuous pressure: a large move of the
    # pressure waits for the whole window, a large move of the switch does not.
    rng = np.random.default_rng(31)
    card = switch_and_pressure_card(rng)
    assert card.features["switch"].histogram.values == [0.0, 1.0]
    assert card.features["pressure"].histogram.values is None
    assert ShiftSettings().short_window_features == "discrete"
    delays: dict[tuple[str, str], int] = {}
    for which in ("all", "discrete"):
        for moved in ("switch", "pressure"):
            check = ShiftCheck(
                ShiftSettings(short_window_predictions=250, evaluate_every_predictions=50, short_window_features=which),
                CheckContext("m", card, "squared", 1.0, "holdout"),
            )
            assert set(check.recent_factors) == ({"switch", "pressure"} if which == "all" else {"switch"})
            share = np.where(np.arange(4000) < 2000, 0.45, 0.75 if moved == "switch" else 0.45)
            switch = (rng.uniform(size=4000) < share).astype(float)
            pressure = rng.normal(5.0, 1.0, 4000) + np.where(
                np.arange(4000) < 2000, 0.0, 1.0 if moved == "pressure" else 0
            )
            for i, (s, p) in enumerate(zip(switch.tolist(), pressure.tolist())):
                check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"switch": s, "pressure": p}))
                v = check.evaluate(float(i))
                if v is not None and i >= 1000:
                    assert set(v.figures["short_window_index"]) == set(check.recent_factors)
                    if v.level != "normal":
                        delays[which, moved] = i - 2000
                        break
    # the switch is seen on the short window either way; the pressure only with "all"
    assert delays["discrete", "switch"] == delays["all", "switch"] < 300
    assert delays["all", "pressure"] < 300 < delays["discrete", "pressure"]


@pytest.mark.parametrize("rows", [30, 300, 3000])
def test_short_window_limit_against_the_exact_binomial_tail(rows):
    # For a 0/1 feature the chance of the short-window index passing its warning limit on
    # unchanged inputs can be summed exactly: the card's count of ones is Binomial(rows, p)
    # (the card stores count / rows), the window's Binomial(250, p) (scipy.stats.binom); the
    # limit is the one of this card, which saw both values (a card that never saw a value has
    # no bin for it, and the value then counts as new: a case this sum leaves out). The
    # limit comes from the chi-square quantile at `significance` 1e-6; the exact chance is
    # close to it for a balanced switch and larger, up to some 25 times, for a rare value (a
    # few expected counts in the window, where the chi-square approximation is known to be poor).
    w, s = 250, 0.5
    rng = np.random.default_rng(rows)
    x = {"switch": (rng.uniform(size=rows) < 0.45).astype(float)}
    y = rng.normal(size=rows)
    from watchdog_edge.files.cardbuild import card_from_arrays

    card = card_from_arrays(model_id="m", x=x, y=y, yhat=y, params=1)
    check = ShiftCheck(
        ShiftSettings(short_window_predictions=w, short_window_features="discrete"),
        CheckContext("m", card, "squared", 1.0, "holdout"),
    )
    limit = ShiftSettings().warning_index * check.recent_factors["switch"]
    bins = len(check.expected["switch"])  # 0, 1, other, missing: each gets the pseudo-count
    worst = 0.0
    for p in (0.03, 0.1, 0.3, 0.45):
        k = np.arange(rows + 1)
        pk = sps.binom.pmf(k, rows, p)
        c = np.arange(w + 1)
        pc = sps.binom.pmf(c, w, p)
        e1, c1 = (k / rows)[:, None], c[None, :]
        index = 0.0
        for e, cnt in ((e1, c1), (1 - e1, w - c1)):
            a = (cnt + s) / (w + s * bins)
            q = (e * w + s) / (w + s * bins)
            index = index + (a - q) * np.log(a / q)
        chance = float((pk[:, None] * pc[None, :] * (index > limit)).sum())
        worst = max(worst, chance)
        if p == 0.45:
            assert chance < 10e-6  # a balanced switch: within 10 times the stated 1e-6
    assert worst < 50e-6
    # the check computes the same index as summed here (one point, by the check's own code)
    vals = [1.0] * 140 + [0.0] * 110
    for i, v in enumerate([0.0] * 750 + vals):
        check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"switch": v}))
    e = card.features["switch"].histogram.shares[1]
    a = np.array([110 + s, 140 + s]) / (w + s * bins)
    q = np.array([(1 - e) * w + s, e * w + s]) / (w + s * bins)
    assert check.recent_indices()["switch"] == pytest.approx(float(np.sum((a - q) * np.log(a / q))))


def doors_card_and_day(rng: np.random.Generator, days: int = 6) -> tuple[ModelCard, np.ndarray]:
    """A count that follows the day, as the demo's door openings: Poisson(2.5) from 06:00 to
    20:00, Poisson(0.3) at night. The card is built from rows logged at random hours; the
    field sends one prediction every 2 minutes (720 a day), in time order."""
    from watchdog_edge.files.cardbuild import card_from_arrays

    def doors(hours: np.ndarray) -> np.ndarray:
        busy = ((hours % 24) >= 6) & ((hours % 24) < 20)
        return rng.poisson(np.where(busy, 2.5, 0.3)).astype(float)

    train = doors(rng.uniform(0, 24 * 30, 1200))
    y = rng.normal(size=train.size)
    card = card_from_arrays(model_id="m", x={"doors": train}, y=y, yhat=y, params=2)
    assert card.features["doors"].histogram.values is not None  # one bin per value
    return card, doors(np.arange(720 * days) * 2 / 60)


def test_a_count_that_follows_the_day_is_left_to_the_whole_window():
    # Over 250 predictions (8 hours) the night's counts are far from the card's day-and-night
    # mix, every night. The older blocks of a 3-day window differ as much, so the homogeneity
    # test sets the feature aside and the short window stays quiet; without the test it raises
    # nightly.
    rng = np.random.default_rng(41)
    card, stream = doors_card_and_day(rng)
    rises = {}
    for alpha in (0.0, 0.01):
        check = ShiftCheck(
            ShiftSettings(recent_predictions=2160, homogeneity_significance=alpha),
            CheckContext("m", card, "squared", 1.0, "holdout"),
        )
        level, rises[alpha], set_aside = "normal", 0, 0
        for i, v in enumerate(stream.tolist()):
            check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"doors": v}))
            verdict = check.evaluate(float(i))
            if verdict is not None:
                rises[alpha] += verdict.level != "normal" and level == "normal"
                level = verdict.level
                if verdict.figures["short_window_set_aside"]:
                    assert verdict.figures["short_window_set_aside"] == ["doors"]
                    assert verdict.figures["short_window_index"] == {}
                    set_aside += 1
        if alpha:
            assert set_aside > 10  # the short window's index passed its limit, and was set aside
    assert rises[0.01] == 0
    assert rises[0.0] >= 1  # raised (and, the days being far from the mix too, kept raised)


def test_homogeneity_of_the_older_blocks_matches_scipy():
    # The test on the older blocks is Pearson's chi-square test of homogeneity: the same
    # decision as scipy.stats.chi2_contingency (no continuity correction) at the same level.
    from watchdog_edge.files.cardbuild import card_from_arrays

    rng = np.random.default_rng(43)
    x = rng.choice([0.0, 1.0, 2.0], size=3000, p=[0.3, 0.3, 0.4])
    y = rng.normal(size=3000)
    card = card_from_arrays(model_id="m", x={"mode": x}, y=y, yhat=y, params=2)
    seen = set()
    for trial in range(30):
        # blocks that differ by a random amount, from none to plainly
        tilt = rng.uniform(0, 0.12) * np.sin(np.arange(1000) * 2 * np.pi / rng.uniform(300, 900))
        p0 = np.clip(0.3 + tilt, 0.01, 0.9)
        vals = np.where(rng.uniform(size=1000) < p0, 0.0, rng.choice([1.0, 2.0], size=1000, p=[3 / 7, 4 / 7]))
        check = ShiftCheck(ShiftSettings(), CheckContext("m", card, "squared", 1.0, "holdout"))
        for i, v in enumerate(vals.tolist()):
            check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"mode": v}))
        older = vals[:750].reshape(3, 250)  # the three blocks before the latest 250
        table = np.array([[int((b == v).sum()) for v in (0.0, 1.0, 2.0)] for b in older])
        p = sps.chi2_contingency(table, correction=False).pvalue
        assert check.homogeneous()["mode"] == (p >= 0.01), (trial, p)
        seen.add(bool(p >= 0.01))
    assert seen == {True, False}  # both outcomes were tried


def test_a_lasting_change_is_raised_once_and_stays_raised():
    # Once raised on the short window, the feature stays watched while the change fills the
    # older blocks (which then differ): no clearing and raising again on the way.
    from watchdog_edge.files.cardbuild import card_from_arrays

    rng = np.random.default_rng(47)
    n = 3000
    switch = (rng.uniform(size=n) < 0.45).astype(float)
    y = rng.normal(size=n)
    card = card_from_arrays(model_id="m", x={"switch": switch}, y=y, yhat=y, params=2)
    for seed in range(5):
        r = np.random.default_rng(seed)
        stream = np.concatenate([r.uniform(size=2000) < 0.45, r.uniform(size=4000) < 0.75]).astype(float)
        check = ShiftCheck(ShiftSettings(), CheckContext("m", card, "squared", 1.0, "holdout"))
        levels = []
        for i, v in enumerate(stream.tolist()):
            check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"switch": v}))
            verdict = check.evaluate(float(i))
            if verdict is not None:
                levels.append((i, verdict.level))
        raised = [i for i, lv in levels if lv != "normal"]
        assert raised[0] - 2000 < 300  # seen on the short window
        assert all(lv != "normal" for i, lv in levels if i >= raised[0])  # and held


def test_evaluations_come_every_50_only_where_the_short_window_has_a_feature_to_watch():
    # continuous features only: every 250 predictions, as before the short window; with a
    # switch on the card: every 50 (short_window_every_predictions)
    rng = np.random.default_rng(53)
    for card, every in ((training_card(rng), 250), (switch_and_pressure_card(rng), 50)):
        check = ShiftCheck(ShiftSettings(), CheckContext("m", card, "squared", 1.0, "holdout"))
        due = []
        for i in range(1000):
            feats = {n: 0.0 for n in card.features}
            if check.on_prediction(Prediction("m", str(i), 0.0, float(i), features=feats)):
                due.append(i + 1)
                check.evaluate(float(i))
        assert due == list(range(every, 1001, every))

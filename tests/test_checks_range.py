"""``range``: share of predictions made outside the card's training range."""

from __future__ import annotations

import json

import numpy as np
import pytest
from pydantic import ValidationError

from watchdog_edge.core.cards import ModelCard, format_validation
from watchdog_edge.core.checks import settings_class
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.range import RangeCheck, RangeSettings
from watchdog_edge.core.records import Prediction

TRAINING_RANGE = {"temp": (10.0, 60.0), "flow": (0.0, 4.0)}


def make_check(**settings) -> RangeCheck:
    card = ModelCard(
        model_id="kiln",
        training={"loss": 2.0, "count": 500},
        fitted_parameters=3,
        holdout={"loss": 2.0, "count": 100},
        features={k: {"min": lo, "max": hi} for k, (lo, hi) in TRAINING_RANGE.items()},
    )
    ctx = CheckContext("kiln", card, "squared", 2.0, "holdout")
    return RangeCheck(RangeSettings(**settings), ctx)


def pred(i: int, **features) -> Prediction:
    return Prediction("kiln", str(i), 1.0, float(i), features=features)


def run(check: RangeCheck, rows: list[dict]) -> list:
    verdicts = []
    for i, feats in enumerate(rows):
        check.on_prediction(pred(i, **feats))
        v = check.evaluate(float(i))
        if v is not None:
            verdicts.append(v)
    return verdicts


def test_inputs_beyond_the_training_range_raise_and_name_the_features_and_distances():
    rng = np.random.default_rng(1)
    temp = rng.uniform(10, 60, 400)
    flow = rng.uniform(0, 4, 400)
    temp[300:] = rng.uniform(61, 75, 100)  # the last quarter runs hotter than ever in training
    flow[350] = -0.5
    check = make_check(recent_predictions=200, evaluate_every_predictions=50, min_predictions=200)
    verdicts = run(check, [{"temp": a, "flow": b} for a, b in zip(temp, flow)])
    # evaluations at rows 200, 250, 300 (none outside yet), 350 (25% outside), 400 (50%)
    assert [v.level for v in verdicts] == ["normal", "normal", "normal", "critical", "critical"]
    last = verdicts[-1]
    # Share over the last 200 rows, recomputed directly with numpy from the training range.
    lo = np.array([TRAINING_RANGE["temp"][0], TRAINING_RANGE["flow"][0]])
    hi = np.array([TRAINING_RANGE["temp"][1], TRAINING_RANGE["flow"][1]])
    x = np.column_stack([temp, flow])[-200:]
    outside = ((x < lo) | (x > hi)).any(axis=1)
    assert last.figures["share"] == pytest.approx(outside.mean())
    feats = last.figures["features"]
    assert feats["temp"]["outside"] == int((x[:, 0] > 60).sum())
    assert feats["temp"]["max_distance_above"] == pytest.approx(x[:, 0].max() - 60.0)
    assert feats["temp"]["max_distance_below"] is None
    assert feats["flow"]["max_distance_below"] == pytest.approx(0.5)
    assert "temp" in last.summary and "above the training maximum 60" in last.summary
    json.dumps(last.figures)  # figures go out as JSON


def test_margin_widens_the_training_range_by_a_share_of_the_range():
    # temp range is 50; a 10% margin admits up to 65 (and down to 5).
    check = make_check(recent_predictions=20, min_predictions=20, evaluate_every_predictions=20, margin=0.1)
    [v] = run(check, [{"temp": 64.0, "flow": 1.0}] * 20)
    assert v.level == "normal" and v.figures["share"] == 0.0
    check = make_check(recent_predictions=20, min_predictions=20, evaluate_every_predictions=20, margin=0.1)
    [v] = run(check, [{"temp": 66.0, "flow": 1.0}] * 20)
    assert v.level == "critical"
    assert v.figures["features"]["temp"]["max_distance_above"] == pytest.approx(1.0)
    assert v.figures["features"]["temp"]["high"] == pytest.approx(65.0)


def test_clears_only_after_the_share_stays_below_the_hysteresis_limit():
    check = make_check(
        recent_predictions=100,
        min_predictions=100,
        evaluate_every_predictions=10,
        warning_share=0.1,
        critical_share=0.5,
        hysteresis=0.5,
        clear_after_evaluations=3,
    )
    rows = [{"temp": 30.0}] * 85 + [{"temp": 70.0}] * 15  # 15% outside: warning
    levels = [v.level for v in run(check, rows)]
    assert levels == ["warning"]
    # Ten more inside rows each step: share 14%, 13%, ... The clear needs <= 5% three times.
    for step in range(12):
        for j in range(10):
            check.on_prediction(pred(1000 + step * 10 + j, temp=30.0))
        levels.append(check.evaluate(0.0).level)
    # Steps 1-8: the 15 outside rows are still in the window (15%). Step 9: 10%, below the
    # warning limit but above 10% x (1 - 0.5) = 5%, so no calm. Steps 10-12: 0%, calm three
    # times in a row, so the level clears at step 12 and not before.
    assert levels[1:] == ["warning"] * 11 + ["normal"]


def test_missing_values_and_rows_without_features_are_not_outside():
    check = make_check(recent_predictions=20, min_predictions=20, evaluate_every_predictions=20)
    for i in range(20):
        check.on_prediction(Prediction("kiln", str(i), 1.0, float(i)))  # no features
    assert check.evaluate(20.0) is None
    [v] = run(check, [{"temp": None, "flow": 2.0, "unknown": 1e9}] * 20)
    assert v.level == "normal" and v.figures["predictions"] == 20


def test_snapshot_restore_mid_stream_gives_identical_verdicts():
    rng = np.random.default_rng(7)
    rows = [{"temp": float(t), "flow": float(f)} for t, f in zip(rng.normal(45, 12, 1200), rng.normal(2, 1.5, 1200))]
    live = make_check(recent_predictions=150, evaluate_every_predictions=7)
    first = run(live, rows[:500])
    copy = make_check(recent_predictions=150, evaluate_every_predictions=7)
    copy.restore(json.loads(json.dumps(live.snapshot())))
    rest_live = run(live, rows[500:])
    rest_copy = run(copy, rows[500:])
    assert first and rest_live == rest_copy
    assert any(v.level != "normal" for v in rest_live)


def test_bad_settings_name_the_key_value_and_rule():
    assert settings_class("range") is RangeSettings
    with pytest.raises(ValidationError) as e:
        RangeSettings(warning_share=0.3, critical_share=0.1)
    assert "critical_share (0.1) must be >= warning_share (0.3)" in format_validation(e.value)
    with pytest.raises(ValidationError) as e:
        RangeSettings(recent_predictions=5)
    assert "recent_predictions = 5" in format_validation(e.value)
    with pytest.raises(ValidationError):
        RangeSettings(windw=300)


# ------------------------------------------------------------ small cards: what chance alone gives


def card_from_rows(train: np.ndarray, margin_missing: float = 0.0) -> ModelCard:
    """A card whose range is the min-max of ``train`` (rows x features)."""
    return ModelCard(
        model_id="m",
        training={"loss": 1.0, "count": train.shape[0]},
        fitted_parameters=2,
        holdout={"loss": 1.0, "count": 50},
        features={f"x{j}": {"min": float(c.min()), "max": float(c.max())} for j, c in enumerate(train.T)},
    )


def stream_levels(check: RangeCheck, rows: np.ndarray) -> list[str]:
    """Levels of every evaluation over ``rows`` (predictions x features), in order."""
    levels = []
    names = [f"x{j}" for j in range(rows.shape[1])]
    for i, r in enumerate(rows.tolist()):
        if check.on_prediction(Prediction("m", str(i), 1.0, float(i), features=dict(zip(names, r)))):
            v = check.evaluate(float(i))
            if v is not None:
                levels.append(v.level)
    return levels


def test_order_statistics_outside_rate_by_simulation():
    # Outside check, by simulation: a new draw falls outside the min-max of n earlier draws of
    # the same continuous distribution with probability 2/(n + 1) (exchangeability: each of the
    # n + 1 values is equally likely to be the smallest or the largest), and for one sample the
    # rate F(min) + 1 - F(max) is Beta(2, n - 1) (the sum of two spacings; David and Nagaraja,
    # Order Statistics, 3rd ed., section 6.4; from memory), compared with scipy.stats.beta.
    from scipy import stats

    rng = np.random.default_rng(4)
    for n in (20, 120, 1000):
        for draw in (rng.standard_normal, rng.standard_exponential):
            reps = 20000 if n < 1000 else 4000
            train = draw((reps, n))
            new = draw(reps)
            outside = (new < train.min(axis=1)) | (new > train.max(axis=1))
            se = np.sqrt(2 / (n + 1) * (1 - 2 / (n + 1)) / reps)
            assert abs(outside.mean() - 2 / (n + 1)) < 4.5 * se
        u = rng.uniform(size=(4000, n))
        rate = u.min(axis=1) + 1 - u.max(axis=1)
        assert stats.kstest(rate, stats.beta(2, n - 1).cdf).pvalue > 0.001


def test_card_rate_bound_holds_for_independent_features_by_simulation():
    # The rate bound (gamma of shape 2d, scale 1/(n + 1)) against a simulation of the sum of d
    # Beta(2, n - 1) rates: the share of cards above it must not exceed CARD_TAIL (1e-3) by more
    # than sampling error; and the gamma quantile itself against scipy.stats.gamma.
    from scipy import stats

    from watchdog_edge.core.checks.range import CARD_TAIL, outside_rate_bound

    rng = np.random.default_rng(5)
    draws = 100_000
    for n, d in ((20, 1), (30, 5), (120, 3), (260, 10), (3000, 50)):
        bound = outside_rate_bound(n, d)
        assert bound == pytest.approx(min(1.0, stats.gamma(2 * d).isf(CARD_TAIL) / (n + 1)), rel=1e-9)
        rates = rng.beta(2, n - 1, size=(draws, d)).sum(axis=1)
        above = (rates > bound).mean()
        assert above < CARD_TAIL + 4 * np.sqrt(CARD_TAIL / draws), (n, d, above)


@pytest.mark.parametrize("n", [20, 120, 1000, 100_000])
@pytest.mark.parametrize("d", [1, 3, 10, 50])
def test_in_distribution_inputs_stay_quiet_for_any_card_size(n, d):
    # Regression: with 120 rows and 3 features about 5 % of fair inputs fall outside, which was
    # the warning share, so range raised and cleared on a fair model. Now the limit is what the
    # card's row count leads one to expect.
    rng = np.random.default_rng(1000 * n + d)
    train = rng.standard_normal((n, d))
    check = RangeCheck(RangeSettings(), CheckContext("m", card_from_rows(train), "squared", 1.0, "holdout"))
    levels = stream_levels(check, rng.standard_normal((3000, d)))
    assert levels and set(levels) == {"normal"}


@pytest.mark.parametrize("n, d", [(300, 1), (300, 3), (1000, 10), (100_000, 50)])
def test_a_fifth_of_inputs_well_outside_is_raised_within_one_window(n, d):
    rng = np.random.default_rng(n + d)
    train = rng.standard_normal((n, d))
    check = RangeCheck(RangeSettings(), CheckContext("m", card_from_rows(train), "squared", 1.0, "holdout"))
    warning, _ = check.limits(check.settings.recent_predictions)
    assert warning < 0.2  # the card leaves room to see it
    fair = rng.standard_normal((1000, d))
    moved = rng.standard_normal((check.settings.recent_predictions, d))
    hit = rng.uniform(size=moved.shape[0]) < 0.2
    moved[hit, 0] = train[:, 0].max() + 1.0  # well outside, but not far outside
    assert set(stream_levels(check, fair)) == {"normal"}
    assert stream_levels(check, moved)[-1] != "normal"
    figs = check.figures()
    assert figs["share"] > figs["warning_limit"] and figs["expected_share"] == pytest.approx(min(1, 2 * d / (n + 1)))


def test_where_the_card_leaves_no_room_the_limit_says_so():
    # 30 rows and 5 features: up to 10/31 of fair inputs may be outside on average, so a fifth
    # leaving the range is not distinguishable from chance; the limit is above a fifth (card
    # build warns). The same holds, just, for 120 rows and 3 features.
    rng = np.random.default_rng(3)
    for n, d in ((30, 5), (120, 3)):
        train = rng.standard_normal((n, d))
        check = RangeCheck(RangeSettings(), CheckContext("m", card_from_rows(train), "squared", 1.0, "holdout"))
        warning, critical = check.limits(200)
        assert warning > 0.2 and critical >= warning


def test_an_input_far_outside_raises_at_once_and_clears_by_the_usual_rule():
    # Regression: a model trained on inputs between 99 and 104 received 24 (a dropout), and
    # range warned 6 hours later, once enough of the window was outside. 24 is 15 ranges below.
    rng = np.random.default_rng(8)
    train = rng.uniform(99, 104, (1000, 1))
    check = RangeCheck(
        RangeSettings(recent_predictions=180, evaluate_every_predictions=20, clear_after_evaluations=3),
        CheckContext("m", card_from_rows(train), "squared", 1.0, "holdout"),
    )
    pred0 = lambda i, x: Prediction("m", str(i), 1.0, float(i), features={"x0": x})  # noqa: E731
    for i in range(5):  # before min_predictions: no evaluation is due
        assert not check.on_prediction(pred0(i, 101.0))
    assert check.evaluate(5.0) is None
    assert check.on_prediction(pred0(5, 24.0))  # asks for an evaluation at once
    v = check.evaluate(5.0)
    assert v is not None and v.level == "critical"
    assert v.figures["far_outside"] == 1 and "training ranges" in v.summary
    assert v.figures["features"]["x0"]["max_distance_below"] == pytest.approx(train.min() - 24.0)
    # A little outside is not far: 104 + 2.5 ranges stays in the share rule (1,000 rows: 3 ranges).
    check2 = RangeCheck(RangeSettings(), CheckContext("m", card_from_rows(train), "squared", 1.0, "holdout"))
    assert check2.far_ranges == 3.0
    assert not check2.on_prediction(pred0(0, float(train.max() + 2.5 * np.ptp(train))))
    # The dropout leaves the window after 180 predictions; then three calm evaluations clear.
    levels = []  # (predictions taken, level)
    for i in range(6, 6 + 260):
        if check.on_prediction(pred0(i, 101.0)) and (v := check.evaluate(float(i))) is not None:
            levels.append((i + 1, v.level))
    assert levels[-1][1] == "normal"
    assert all(level == "critical" for taken, level in levels if taken <= 186)  # still in the window
    first_normal = next(taken for taken, level in levels if level == "normal")
    assert first_normal >= 186 + 2 * 20  # three calm evaluations, 20 predictions apart


def test_far_outside_distance_for_exponential_tails_by_simulation():
    # Outside check, by simulation: for n exponential training values, a new one passes
    # max + k ranges with probability n/(n + 1) / C(n + k, k + 1). At k = 1 and 2 the
    # probability is large enough to count; the rule then takes the k that brings it below 1e-9.
    from math import comb

    from watchdog_edge.core.checks.range import FAR_PROBABILITY, far_ranges

    rng = np.random.default_rng(9)
    draws = 200_000
    for n in (20, 30):
        train = rng.standard_exponential((draws, n))
        new = rng.standard_exponential(draws)
        hi, width = train.max(axis=1), np.ptp(train, axis=1)
        for k in (1, 2):
            p = n / (n + 1) / comb(n + k, k + 1)
            seen = (new > hi + k * width).mean()
            assert abs(seen - p) < 4.5 * np.sqrt(p / draws) + 1e-6, (n, k, seen, p)
        k = far_ranges(n, 0.0)
        assert n / (n + 1) / comb(n + int(k), int(k) + 1) < FAR_PROBABILITY
        assert n / (n + 1) / comb(n + int(k) - 1, int(k)) >= FAR_PROBABILITY  # the smallest such k


@pytest.mark.parametrize("n, d", [(30, 5), (120, 10), (1000, 50)])
def test_correlated_features_stay_quiet_too(n, d):
    # The union bound holds whatever the features' dependence: strongly correlated features
    # (a common factor with loading 0.9) leave fewer fair inputs outside than the bound allows.
    rng = np.random.default_rng(n + 7 * d)

    def draw(k: int) -> np.ndarray:
        return 0.9 * rng.standard_normal((k, 1)) + np.sqrt(1 - 0.81) * rng.standard_normal((k, d))

    check = RangeCheck(RangeSettings(), CheckContext("m", card_from_rows(draw(n)), "squared", 1.0, "holdout"))
    levels = stream_levels(check, draw(3000))
    assert levels and set(levels) == {"normal"}

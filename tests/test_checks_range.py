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

"""``feed_stop``: a prediction or truth feed that stops, noticed on ticks of core time."""

from __future__ import annotations

import json

import pytest
from pydantic import ValidationError

from watchdog_edge.core.cards import ModelCard, format_validation
from watchdog_edge.core.checks import settings_class
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.feed_stop import FeedStopCheck, FeedStopSettings
from watchdog_edge.core.records import Prediction, Truth


def make_check(**settings) -> FeedStopCheck:
    card = ModelCard(
        model_id="pump", training={"loss": 1.0, "count": 100}, fitted_parameters=2, holdout={"loss": 1.0, "count": 50}
    )
    return FeedStopCheck(FeedStopSettings(**settings), CheckContext("pump", card, "squared", 1.0, "holdout"))


def test_a_stalled_truth_feed_is_reported_after_its_timeout_and_clears_when_truths_return():
    check = make_check(prediction_timeout_s=120, truth_timeout_s=600, critical_factor=3)
    changes = []
    # Predictions every 10 s for two hours; truths every 60 s, but they stop after t = 1000.
    for t in range(0, 7200, 10):
        check.on_prediction(Prediction("pump", str(t), 1.0, float(t)))
        if t % 60 == 0 and (t <= 1000 or t >= 4000):
            check.on_truth(Truth("pump", str(t), 1.0, float(t)))
        v = check.evaluate(float(t))
        if v is not None:
            changes.append((t, v))
    # The last truth before the stall is at t = 960; 600 s later is 1560, so the first
    # evaluation with more than 600 s without a truth is at t = 1570; 3 x 600 s after 960 (2760) it
    # turns critical at 2770; truths resume on the first minute mark from 4000 on, 4020.
    assert [(t, v.level) for t, v in changes] == [(1570, "warning"), (2770, "critical"), (4020, "normal")]
    raised = changes[0][1]
    assert raised.figures["seconds_since_truth"] == 610.0
    assert raised.figures["seconds_since_prediction"] == 0.0
    assert "no truth has arrived for 10 min" in raised.summary
    assert changes[2][1].figures["seconds_since_truth"] == 0.0


def test_ticks_alone_reveal_a_feed_that_stops():
    check = make_check(prediction_timeout_s=60, truth_timeout_s=None)
    check.on_prediction(Prediction("pump", "1", 1.0, 100.0))
    assert check.evaluate(100.0) is None
    assert check.evaluate(160.0) is None  # exactly the timeout: not longer than it
    v = check.evaluate(161.0)
    assert v.level == "warning" and v.figures["seconds_since_truth"] == 61.0
    assert check.evaluate(170.0) is None  # no change, nothing new to say


def test_a_feed_that_never_starts_counts_from_the_first_moment_watched():
    check = make_check(prediction_timeout_s=300, truth_timeout_s=900)
    assert check.evaluate(1000.0) is None  # the watch starts here (agent start)
    for t in range(1000, 1900, 30):
        check.on_prediction(Prediction("pump", str(t), 1.0, float(t)))
        check.evaluate(float(t))
    v = check.evaluate(1901.0)
    assert v.level == "warning"
    assert v.figures["truth_seen"] is False and v.figures["seconds_since_truth"] == 901.0
    assert "since the watchdog began watching" in v.summary


def test_a_timeout_of_none_switches_that_feed_off():
    check = make_check(prediction_timeout_s=60, truth_timeout_s=None)
    for t in range(0, 10_000, 30):
        check.on_prediction(Prediction("pump", str(t), 1.0, float(t)))
        assert check.evaluate(float(t)) is None


def test_a_new_model_version_reports_a_lasting_feed_stop_afresh():
    check = make_check(prediction_timeout_s=60, truth_timeout_s=100)
    check.on_prediction(Prediction("pump", "1", 1.0, 0.0))
    check.on_truth(Truth("pump", "1", 1.0, 0.0))
    check.on_prediction(Prediction("pump", "2", 1.0, 150.0))
    assert check.evaluate(150.0).level == "warning"
    check.reset()  # the alert book closed the episode
    check.on_prediction(Prediction("pump", "3", 1.0, 160.0, model_version="v2"))
    assert check.evaluate(160.0).level == "warning"  # truths are still missing


def test_snapshot_restore_gives_identical_verdicts():
    live = make_check(prediction_timeout_s=50, truth_timeout_s=2000)
    for t in range(0, 300, 20):
        live.on_prediction(Prediction("pump", str(t), 1.0, float(t)))
        live.evaluate(float(t))
    copy = make_check(prediction_timeout_s=50, truth_timeout_s=2000)
    copy.restore(json.loads(json.dumps(live.snapshot())))
    a = [live.evaluate(float(t)) for t in range(300, 2000, 25)]
    b = [copy.evaluate(float(t)) for t in range(300, 2000, 25)]
    assert a == b and [v.level for v in a if v is not None] == ["warning", "critical"]


def test_bad_settings_are_explained():
    assert settings_class("feed_stop") is FeedStopSettings
    with pytest.raises(ValidationError) as e:
        FeedStopSettings(prediction_timeout_s=None, truth_timeout_s=None)
    assert "both prediction_timeout_s and truth_timeout_s are null" in format_validation(e.value)
    with pytest.raises(ValidationError) as e:
        FeedStopSettings(truth_timeout_s=-5)
    assert "truth_timeout_s = -5" in format_validation(e.value)
    FeedStopSettings(enabled=False, prediction_timeout_s=None, truth_timeout_s=None)

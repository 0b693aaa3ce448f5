"""The check protocol: a verb that returns False may only do so where evaluate has nothing new.

The core skips ``evaluate`` after a verb that returns False. Every check is driven twice over
the same troubled stream (inputs leaving the training range and moving, errors growing, feeds going
quiet, ticks, a version change), once asking ``evaluate`` after every input and once the way
the core does; the verdicts must be the same, at the same times.
"""

from __future__ import annotations

import numpy as np
import pytest

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.checks import CHECK_NAMES, check_class, settings_class
from watchdog_edge.core.checks.base import Check, CheckContext
from watchdog_edge.core.records import Pair, Prediction, Truth

EDGES = [-3.0, -1.0, 0.0, 1.0, 3.0]
CARD = ModelCard(
    model_id="kiln",
    training={"loss": 1.0, "count": 2000},
    fitted_parameters=4,
    least_squares=True,
    holdout={"loss": 1.0, "count": 500},
    features={
        n: {"min": -3.0, "max": 3.0, "histogram": {"edges": EDGES, "shares": [0.16, 0.34, 0.34, 0.16]}}
        for n in ("a", "b")
    },
)
SETTINGS = {
    "gap": {"evaluate_every_pairs": 7},
    "range": {"recent_predictions": 60, "min_predictions": 30, "evaluate_every_predictions": 9},
    "shift": {"recent_predictions": 100, "evaluate_every_predictions": 25},
    "feed_stop": {"prediction_timeout_s": 40.0, "truth_timeout_s": 90.0},
    "drift": {"detector": "page_hinkley"},
    "baseline": {"learners": ["mean", "linear"], "recent_pairs": 80, "min_pairs": 40, "evaluate_every_pairs": 5},
}


def stream(seed: int):
    """(kind, time, item) of a stream that raises and clears every check.

    Ticks come every ten predictions, except while the truths stop: that stop must be
    noticed at a prediction.
    """
    rng = np.random.default_rng(seed)
    t, out, waiting = 0.0, [], []
    for i in range(1500):
        if i in (400, 900):  # two stops of two minutes, with the timer ticking through them
            out += [("tick", t + k, None) for k in range(5, 120, 5)]
            t += 120.0
        t += 1.0
        phase = i // 300  # healthy, inputs outside, inputs moved, errors grown, healthy
        x = rng.normal(0.0, 1.0, 2) + (4.0 if phase == 1 else 1.2 if phase == 2 else 0.0)
        feats = {"a": float(x[0]), "b": None if i % 50 == 0 else float(x[1])}
        p = Prediction("kiln", str(i), 0.0, t, features=feats, model_version="v2" if i >= 1200 else "v1")
        out.append(("prediction", t, p))
        if i % 3:
            waiting.append(p)
        truths_stop = 1000 <= i < 1150  # the meter stops while predictions go on, untimed
        while waiting and not truths_stop and (rng.random() < 0.5 or len(waiting) > 5):
            q = waiting.pop(0)
            # errors grow in the fourth phase; in the fifth the truth moves off the model's
            # zero, which a running mean learns (baseline)
            err = rng.normal(1.5 if phase == 4 else 0.0, 2.5 if phase == 3 else 1.0)
            tr = Truth("kiln", q.id, err, t)
            out.append(("truth", t, tr))
            out.append(("pair", t, Pair(q, tr, t)))
        if i % 10 == 0 and not truths_stop:
            out.append(("tick", t + 0.5, None))
    return out


def drive(name: str, items, skip: bool) -> list[tuple[float, str, str]]:
    settings = settings_class(name)(**SETTINGS[name])
    check = check_class(name)(settings, CheckContext("kiln", CARD, "squared", 1.0, "holdout", 50, None, 30))
    verdicts, version = [], "v1"
    for kind, t, item in items:
        if kind == "prediction" and item.model_version != version:
            version = item.model_version
            check.reset()
        if kind == "prediction":
            due = check.on_prediction(item)
        elif kind == "truth":
            due = check.on_truth(item)
        elif kind == "pair":
            due = check.on_pair(item, (item.truth.value - item.prediction.value) ** 2)
        else:
            due = True
        if skip and not due:
            continue
        v = check.evaluate(t)
        if v is not None:
            verdicts.append((t, v.level, v.summary))
    return verdicts


@pytest.mark.parametrize("name", sorted(SETTINGS))
@pytest.mark.parametrize("seed", [1, 2])
def test_skipping_evaluate_after_false_changes_no_verdict(name, seed):
    items = stream(seed)
    every = drive(name, items, skip=False)
    assert drive(name, items, skip=True) == every
    assert {level for _, level, _ in every} >= {"normal", "warning"} or name == "drift"
    assert every


VERBS = {"prediction": "on_prediction", "truth": "on_truth", "pair": "on_pair"}


@pytest.mark.parametrize("name", CHECK_NAMES)
def test_each_check_declares_exactly_the_verbs_it_writes(name):
    # The core calls the verbs a check names in ``takes`` and no others: a verb written but
    # not declared would never run, one declared but not written would run the base's no-op.
    cls = check_class(name)
    written = {kind for kind, verb in VERBS.items() if getattr(cls, verb) is not getattr(Check, verb)}
    assert set(cls.takes) == written
    assert set(cls.reacts_to) <= {"prediction", "truth", "pair", "tick"}

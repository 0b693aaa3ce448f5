"""``baseline``: cheap online learners (river) scored test-then-train against the deployed model."""

from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import pytest
from pydantic import ValidationError
from scipy import stats as sps

from watchdog_edge.core.cards import ModelCard, format_validation
from watchdog_edge.core.checks import settings_class
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.baseline import BaselineCheck, BaselineSettings, hash_share
from watchdog_edge.core.records import Pair, Prediction, Truth


def make_check(window: int = 400, loss: str = "squared", **settings) -> BaselineCheck:
    card = ModelCard(
        model_id="oven",
        loss=loss,
        training={"loss": 1.0, "count": 1000},
        fitted_parameters=3,
        holdout={"loss": 1.0, "count": 300},
    )
    ctx = CheckContext("oven", card, loss, 1.0, "holdout", window_size=window, min_pairs=100)
    return BaselineCheck(BaselineSettings(**settings), ctx)


def stream(
    check: BaselineCheck,
    X: list[dict],
    y: np.ndarray,
    pred: np.ndarray,
    dt: float = 1.0,
    start: int = 0,
    ids: list[str] | None = None,
) -> list:
    out = []
    for i in range(len(y)):
        k = start + i
        t = 1000.0 + k * dt
        pid = ids[i] if ids else str(k)
        pair = Pair(Prediction("oven", pid, float(pred[i]), t, features=X[i]), Truth("oven", pid, float(y[i]), t), t)
        check.on_pair(pair, (float(y[i]) - float(pred[i])) ** 2)
        v = check.evaluate(t)
        if v is not None:
            out.append(v)
    return out


def data(rng: np.random.Generator, n: int) -> tuple[list[dict], np.ndarray, np.ndarray]:
    """A process y = 3 + 2 a - b + noise, with the true function as an honest model."""
    a, b = rng.normal(0, 1, n), rng.normal(0, 1, n)
    f = 3 + 2 * a - b
    y = f + rng.normal(0, 1, n)
    return [{"a": float(u), "b": float(v)} for u, v in zip(a, b)], y, f


def newey_west(d: np.ndarray, bandwidth: float) -> float:
    """Bartlett-kernel long-run variance written out from Newey and West (1987)."""
    z = d - d.mean()
    n = len(z)
    lrv = z @ z / n
    for j in range(1, n):
        w = 1 - j / bandwidth
        if w <= 0:
            break
        lrv += 2 * w * (z[j:] @ z[:-j]) / n
    return lrv


def test_a_model_worse_than_the_mean_raises_against_mean_with_the_published_statistic():
    rng = np.random.default_rng(3)
    X, y, _ = data(rng, 1200)
    model = np.full(1200, 3.0) + 1.8  # constant and biased: worse than the running mean
    check = make_check(learners=["mean"], recent_pairs=400)
    out = stream(check, X, y, model)
    last = out[-1]
    assert last.level == "warning" and last.figures["learner"] == "mean"
    f = last.figures
    # The mean learner's test-then-train predictions are the mean of the earlier truths (0 first).
    prev_mean = np.r_[0.0, np.cumsum(y)[:-1] / np.arange(1, len(y))]
    learner_loss = (y - prev_mean)[-400:] ** 2
    model_loss = (y - model)[-400:] ** 2
    assert f["learner_loss"] == pytest.approx(learner_loss.mean())
    assert f["model_loss"] == pytest.approx(model_loss.mean())
    assert f["margin"] == pytest.approx(1 - learner_loss.mean() / model_loss.mean())
    # Diebold and Mariano (1995) statistic with the Harvey, Leybourne and Newbold (1997) factor
    # sqrt((n + 1 - 2h + h(h - 1)/n) / n) for h = 1, Student t with n - 1 df (scipy).
    d = model_loss - learner_loss
    n = len(d)
    bw = f["learners"]["mean"]["bandwidth"]
    dm = d.mean() / math.sqrt(newey_west(d, bw) / n)
    hln = dm * math.sqrt((n + 1 - 2 + 0) / n)
    assert f["statistic"] == pytest.approx(hln, rel=1e-9)
    assert f["p_value"] == pytest.approx(sps.t.sf(hln, n - 1), rel=1e-6, abs=1e-300)
    assert f["p_value"] < 0.01
    assert "running mean of the truth beats the deployed model" in last.summary
    json.dumps(f)


def test_a_good_model_is_not_beaten_by_any_learner():
    rng = np.random.default_rng(5)
    X, y, f = data(rng, 3000)
    check = make_check(learners=["mean", "linear", "tree"], recent_pairs=500)
    out = stream(check, X, y, f)
    assert out and {v.level for v in out} == {"normal"}
    res = out[-1].figures["learners"]
    assert set(res) == {"mean", "linear", "tree"}
    assert res["mean"]["margin"] < -1  # the mean is far worse than the true function
    assert "No online learner beats" in out[-1].summary


def test_a_model_that_ignores_an_input_is_beaten_by_linear_and_critical_past_the_margin():
    rng = np.random.default_rng(7)
    X, y, f = data(rng, 2500)
    poor = 3 + 2 * np.array([x["a"] for x in X])  # ignores b: extra squared error of 1
    check = make_check(learners=["mean", "linear"], recent_pairs=500, critical_margin=0.3)
    out = stream(check, X, y, poor)
    assert out[-1].level == "critical" and out[-1].figures["learner"] == "linear"
    assert out[-1].figures["margin"] > 0.3


def test_learner_losses_match_river_driven_directly_with_imputation_written_out():
    # The linear learner must be exactly river's StandardScaler | LinearRegression scored
    # test-then-train, fed the features with missing ones replaced by their running mean.
    from river import linear_model, preprocessing

    rng = np.random.default_rng(9)
    X, y, f = data(rng, 600)
    for i in range(0, 600, 7):
        X[i] = {"a": None, "b": X[i]["b"]}  # null value
    for i in range(3, 600, 11):
        X[i] = {"a": X[i]["a"]}  # absent key
    for i in range(300, 600):
        X[i] = dict(X[i], c=float(rng.normal()))  # a feature that appears mid-stream
    check = make_check(learners=["linear"], recent_pairs=600, min_pairs=600, evaluate_every_pairs=600)
    [v] = stream(check, X, y, f)
    ref = preprocessing.StandardScaler() | linear_model.LinearRegression()
    sums: dict[str, list[float]] = {}
    losses, imputed = [], 0
    for xi, yi in zip(X, y):
        x = {}
        for k, val in xi.items():
            st = sums.setdefault(k, [0.0, 0.0])
            if val is None:
                x[k] = st[1] / st[0] if st[0] else 0.0
                imputed += 1
            else:
                x[k] = val
                st[0] += 1
                st[1] += val
        for k, st in sums.items():
            if k not in x:
                x[k] = st[1] / st[0] if st[0] else 0.0
                imputed += 1
        losses.append((yi - ref.predict_one(x)) ** 2)
        ref.learn_one(x, yi)
    assert v.figures["learners"]["linear"]["learner_loss"] == pytest.approx(np.mean(losses), rel=1e-9)
    assert v.figures["imputed"] == imputed and imputed > 100


def test_cpu_budget_share_is_chosen_by_a_stable_hash_and_the_rate_is_capped():
    rng = np.random.default_rng(11)
    X, y, f = data(rng, 2000)
    ids = [f"batch-{i}" for i in range(2000)]
    check = make_check(learners=["mean"], learn_share=0.25)
    stream(check, X, y, f, ids=ids)
    # hash_share is BLAKE2b over the id, written out here with hashlib.
    expect = sum(int.from_bytes(hashlib.blake2b(i.encode(), digest_size=8).digest(), "big") / 2**64 < 0.25 for i in ids)
    assert hash_share("batch-7") == int.from_bytes(hashlib.blake2b(b"batch-7", digest_size=8).digest(), "big") / 2**64
    figs = check.figures()
    assert figs["scored"] == expect and figs["skipped_share"] == 2000 - expect
    assert 400 < expect < 600
    # Ten pairs a second of core time with a cap of 2 per second: about a fifth is used.
    check = make_check(learners=["mean"], max_pairs_per_s=2.0)
    stream(check, X, y, f, dt=0.1)
    figs = check.figures()
    assert figs["scored"] + figs["skipped_rate"] == 2000
    assert abs(figs["scored"] - 2 * 200) <= 2
    # Pairs without features cannot be scored and are counted.
    check = make_check(learners=["mean"])
    stream(check, [{}] * 50, y[:50], f[:50])
    assert check.figures()["no_features"] == 50 and check.figures()["scored"] == 0


def test_clears_when_the_model_is_fixed():
    rng = np.random.default_rng(13)
    X, y, f = data(rng, 3000)
    model = f.copy()
    model[:1000] = 3.0  # no better than a constant at first
    check = make_check(learners=["linear"], recent_pairs=300, evaluate_every_pairs=50, clear_after_evaluations=3)
    levels = [v.level for v in stream(check, X, y, model)]
    assert "warning" in levels[:10] and levels[-1] == "normal"
    first_ok = levels.index("normal", levels.index("warning"))
    assert all(lv == "normal" for lv in levels[first_ok:])


def test_snapshot_restore_mid_stream_gives_identical_verdicts():
    rng = np.random.default_rng(15)
    X, y, f = data(rng, 1600)
    model = f + np.where(np.arange(1600) > 800, 1.5, 0.0)
    settings = dict(learners=["mean", "linear", "tree"], recent_pairs=300, evaluate_every_pairs=40)
    live = make_check(**settings)
    stream(live, X[:700], y[:700], model[:700])
    copy = make_check(**settings)
    copy.restore(json.loads(json.dumps(live.snapshot())))
    a = stream(live, X[700:], y[700:], model[700:], start=700)
    b = stream(copy, X[700:], y[700:], model[700:], start=700)
    assert a == b and any(v.level != "normal" for v in a)


def test_settings_are_explained():
    assert settings_class("baseline") is BaselineSettings
    with pytest.raises(ValidationError) as e:
        BaselineSettings(learners=["mean", "forest"])
    assert "learners[1] = 'forest'" in format_validation(e.value)
    with pytest.raises(ValidationError) as e:
        BaselineSettings(learners=["mean", "mean"])
    assert "name a learner twice" in format_validation(e.value)
    with pytest.raises(ValidationError) as e:
        BaselineSettings(margin=0.4, critical_margin=0.2)
    assert "critical_margin (0.2) must be >= margin (0.4)" in format_validation(e.value)

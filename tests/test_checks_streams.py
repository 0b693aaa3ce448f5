"""The checks end to end through the Monitor, on data sets that river and scikit-learn ship.

- river.datasets.synth.FriedmanDrift (Ikonomovska, Gama and Dzeroski, 2011): the global
  recurring abrupt variant swaps the roles of the inputs at a known position.
- river.datasets.synth.Friedman (Friedman, 1991): the same process, stationary.
- scikit-learn's bundled diabetes data (Efron et al., 2004), 442 patients.
"""

from __future__ import annotations

import json
from functools import lru_cache

import numpy as np
import pytest

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.events import Alert
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.settings import parse_config

T0 = 1_750_000_000.0


def histogram_card(
    model: str,
    X: np.ndarray,
    names: list[str],
    train_resid: np.ndarray,
    d: int,
    holdout_resid: np.ndarray | None = None,
    bins: int = 10,
) -> ModelCard:
    """A card as made at training time: training range and quantile histogram of every input."""
    feats = {}
    for j, name in enumerate(names):
        col = X[:, j]
        edges = np.quantile(col, np.linspace(0, 1, bins + 1))
        idx = np.searchsorted(edges[1:-1], col, side="right")
        shares = np.bincount(idx, minlength=bins) / len(col)
        feats[name] = {
            "min": float(col.min()),
            "max": float(col.max()),
            "histogram": {"edges": edges.tolist(), "shares": shares.tolist()},
        }
    holdout = None
    if holdout_resid is not None:
        holdout = {"loss": float(np.mean(holdout_resid**2)), "count": len(holdout_resid)}
    return ModelCard(
        model_id=model,
        training={"loss": float(np.mean(train_resid**2)), "count": len(train_resid)},
        fitted_parameters=d,
        least_squares=True,
        holdout=holdout,
        features=feats,
    )


def config(model: str, checks: dict, window: dict | None = None):
    entry = {
        "id": model,
        "card": f"{model}.json",
        "prediction_topic": f"{model}/pred",
        "truth_topic": f"{model}/truth",
        "checks": checks,
    }
    if window:
        entry["window"] = window
    return parse_config({"agent": {"name": "streams"}, "models": [entry]})


def alerts(events) -> list[Alert]:
    return [e for e in events if isinstance(e, Alert)]


# -- Friedman ----------------------------------------------------------------------------

FRIEDMAN_NAMES = [f"x{j}" for j in range(10)]


def friedman_rows(ds, n: int) -> tuple[np.ndarray, np.ndarray]:
    X, y = [], []
    for x, target in ds.take(n):
        X.append([x[j] for j in range(10)])
        y.append(target)
    return np.array(X), np.array(y)


def friedman_basis(X: np.ndarray) -> np.ndarray:
    """The terms of Friedman's function; a least-squares fit on them is a well specified model."""
    return np.column_stack([np.sin(np.pi * X[:, 0] * X[:, 1]), (X[:, 2] - 0.5) ** 2, X[:, 3], X[:, 4], np.ones(len(X))])


def fit_friedman(X: np.ndarray, y: np.ndarray, n_train: int, n_holdout: int) -> tuple[np.ndarray, ModelCard]:
    B = friedman_basis(X[:n_train])
    coef, *_ = np.linalg.lstsq(B, y[:n_train], rcond=None)
    pred = friedman_basis(X) @ coef
    resid = y - pred
    card = histogram_card(
        "fr", X[:n_train], FRIEDMAN_NAMES, resid[:n_train], d=5, holdout_resid=resid[n_train : n_train + n_holdout]
    )
    return pred, card


def friedman_messages(X, y, pred, start: int, stop: int, batch: int = 1):
    """(t, topic, payload) of predictions and their truths half a second later, ``batch`` a message."""
    out = []
    for b in range(start, stop, batch):
        idx = range(b, min(b + batch, stop))
        t = T0 + b
        preds = [
            {
                "id": i,
                "value": float(pred[i]),
                "ts": T0 + i - 0.2,
                "features": dict(zip(FRIEDMAN_NAMES, map(float, X[i]))),
            }
            for i in idx
        ]
        truths = [{"id": i, "value": float(y[i])} for i in idx]
        if batch == 1:
            preds, truths = preds[0], truths[0]
        out.append((t, "fr/pred", json.dumps(preds)))
        out.append((t + 0.5, "fr/truth", json.dumps(truths)))
    return out


DRIFT_AT = 4000


@lru_cache(maxsize=1)
def friedman_drift():
    from river.datasets import synth

    ds = synth.FriedmanDrift(drift_type="gra", position=(DRIFT_AT, 2 * DRIFT_AT), seed=7)
    X, y = friedman_rows(ds, 6000)
    pred, card = fit_friedman(X, y, n_train=1500, n_holdout=500)  # frozen before the drift
    return friedman_messages(X, y, pred, 2000, 6000), card


def test_a_model_frozen_before_the_drift_is_flagged_after_it_and_not_before():
    messages, card = friedman_drift()
    mon = Monitor(config("fr", {"drift": {}}), {"fr": card})
    got = []
    for t, topic, payload in messages:
        got += alerts(mon.feed(topic, payload, t))
    drift_t = T0 + DRIFT_AT
    assert all(a.t >= drift_t for a in got), [(a.check, a.t - T0) for a in got if a.t < drift_t]
    first = [a for a in got if a.check in ("drift", "gap") and a.state == "raised"]
    # Stated delay: the first drift or gap alert within 100 pairs (100 s) of the drift position.
    assert first and first[0].t <= drift_t + 100
    drift = [a for a in got if a.check == "drift"]
    assert drift and drift[0].state == "raised"
    f = drift[0].figures
    assert abs(f["change_t"] - (drift_t + 0.5)) <= 20  # truths arrive at t + 0.5
    assert f["change_ts"] == pytest.approx(f["change_t"] - 0.7)  # the prediction's source time
    assert f["mean_after"] > 10 * f["mean_before"]
    assert any(a.check == "gap" and a.state == "raised" for a in got)


@pytest.mark.slow
def test_snapshot_and_restore_mid_episode_through_the_monitor_gives_the_same_alerts():
    messages, card = friedman_drift()
    cfg = config("fr", {"drift": {}, "baseline": {"learners": ["mean", "linear", "tree"]}})
    live = Monitor(cfg, {"fr": card})
    cut = 2 * (DRIFT_AT + 20 - 2000)  # after the drift alert and gap's warning (gross errors), before gap's critical
    head = []
    for t, topic, payload in messages[:cut]:
        head += alerts(live.feed(topic, payload, t))
    assert [(a.check, a.severity) for a in head] == [("gap", "warning"), ("drift", "warning")]
    restored = Monitor.restore(cfg, {"fr": card}, json.loads(json.dumps(live.snapshot())))
    tail_live, tail_restored = [], []
    for t, topic, payload in messages[cut:]:
        tail_live += alerts(live.feed(topic, payload, t))
        tail_restored += alerts(restored.feed(topic, payload, t))
    assert [a.to_dict() for a in tail_live] == [a.to_dict() for a in tail_restored]
    assert {a.check for a in tail_live} >= {"gap", "baseline"}


@pytest.mark.slow
def test_a_stationary_friedman_stream_of_100000_raises_nothing_with_every_check_on():
    from river.datasets import synth

    n = 100_000
    X, y = friedman_rows(synth.Friedman(seed=3), n + 7000)
    pred, card = fit_friedman(X, y, n_train=5000, n_holdout=2000)
    mon = Monitor(config("fr", {"drift": {}, "baseline": {}}), {"fr": card})
    got = []
    for k, (t, topic, payload) in enumerate(friedman_messages(X, y, pred, 7000, 7000 + n, batch=50)):
        got += alerts(mon.feed(topic, payload, t))
        if k % 2:
            got += alerts(mon.tick(t + 0.1))
    assert got == []
    state = mon.state("fr")
    assert state["pairs"] == n
    checks = state["checks"]
    assert set(checks) == {"gap", "range", "shift", "feed_stop", "drift", "baseline"}
    assert checks["baseline"]["figures"]["scored"] == n
    assert checks["shift"]["figures"]["index"]["x0"] < 0.05
    assert checks["gap"]["figures"]["pairs"] == 500


# -- diabetes ----------------------------------------------------------------------------


@lru_cache(maxsize=1)
def diabetes_split():
    from sklearn.datasets import load_diabetes
    from sklearn.linear_model import LinearRegression

    data = load_diabetes()
    X, y, names = data.data, data.target, list(data.feature_names)
    perm = np.random.default_rng(1).permutation(len(y))
    fit_rows, stream_rows = perm[:221], perm[221:]
    model = LinearRegression().fit(X[fit_rows], y[fit_rows])
    resid = y[fit_rows] - model.predict(X[fit_rows])
    # No held-out loss: the expected loss is the final prediction error of the 11-parameter fit.
    card = histogram_card("db", X[fit_rows], names, resid, d=11, bins=5)
    return X[stream_rows], y[stream_rows], model.predict(X[stream_rows]), names, card, float(y.std())


def diabetes_alerts(offset: float, start: int) -> tuple[list[Alert], Monitor]:
    X, y, pred, names, card, _ = diabetes_split()
    mon = Monitor(config("db", {"drift": {}}), {"db": card})
    got = []
    for k in range(len(y)):
        t = T0 + 60 * k  # a lab sample every minute, the result half a minute later
        got += alerts(
            mon.feed(
                "db/pred",
                json.dumps({"id": k, "value": float(pred[k]), "features": dict(zip(names, map(float, X[k])))}),
                t,
            )
        )
        truth = float(y[k]) + (offset if k >= start else 0.0)
        got += alerts(mon.feed("db/truth", json.dumps({"id": k, "value": truth}), t + 30))
    return got, mon


def test_diabetes_linear_model_on_the_other_split_raises_no_gap():
    got, mon = diabetes_alerts(0.0, 0)
    assert [a for a in got if a.check in ("gap", "drift")] == []
    gap = mon.state("db")["checks"]["gap"]["figures"]
    assert gap["pairs"] >= 200 and gap["expected_source"] == "fpe"  # gap did evaluate


def test_diabetes_with_an_offset_from_mid_stream_raises_gap_and_drift_near_the_change():
    *_, sd = diabetes_split()
    mid = 221 // 2
    got, _ = diabetes_alerts(2 * sd, mid)
    change_t = T0 + 60 * mid + 30
    gap = [a for a in got if a.check == "gap" and a.state == "raised"]
    drift = [a for a in got if a.check == "drift" and a.state == "raised"]
    assert gap and drift
    assert all(a.t >= change_t for a in gap + drift)
    assert abs(drift[0].figures["change_t"] - change_t) <= 5 * 60  # within 5 pairs
    assert drift[0].figures["mean_after"] > 4 * drift[0].figures["mean_before"]

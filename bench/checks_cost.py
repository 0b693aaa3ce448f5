"""Cost of each check per record, and of each baseline learner against river's own loop.

Records are built and parsed before timing starts (Prediction, Truth and Pair objects with
five features), and each check is driven the way the core drives it: the record's verb where
the check has one, then ``evaluate`` where the record's kind is among the check's
``reacts_to`` and the verb did not return False. Two references are measured in the same run:

- for every baseline learner, river's own test-then-train loop on the same feature dicts
  (``predict_one`` then ``learn_one``), so the printed overhead is what the check adds on top
  of river (target: at most 25% or 3 us per pair, whichever is larger);
- for ``drift``, river's detector ``update`` alone on the same loss ratios.

The default checks (gap, range, shift, feed_stop) together have an absolute target of at most
3 us per record; as a scale, the cost of ``json.loads`` of one such record is printed too.

    python3 bench/checks_cost.py [--pairs 5000] [--rounds 15]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.checks import check_class, settings_class
from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings
from watchdog_edge.core.checks.baseline import make_learner
from watchdog_edge.core.records import Pair, Prediction, Truth

FEATURES = ("a", "b", "c", "d", "e")


def build(n: int, seed: int = 1) -> tuple[ModelCard, list[Prediction], list[Truth], list[Pair], list[float]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, len(FEATURES)))
    w = np.array([1.0, -2.0, 0.5, 0.0, 3.0])
    y = X @ w + rng.normal(size=n)
    pred = X @ w
    train = rng.normal(size=(5000, len(FEATURES)))
    feats = {}
    for j, name in enumerate(FEATURES):
        edges = np.quantile(train[:, j], np.linspace(0, 1, 11))
        idx = np.searchsorted(edges[1:-1], train[:, j], side="right")
        shares = np.bincount(idx, minlength=10) / len(train)
        feats[name] = {
            "min": float(train[:, j].min()),
            "max": float(train[:, j].max()),
            "histogram": {"edges": edges.tolist(), "shares": shares.tolist()},
        }
    card = ModelCard(
        model_id="bench",
        training={"loss": 1.0, "count": 5000},
        fitted_parameters=6,
        least_squares=True,
        holdout={"loss": 1.0, "count": 1000},
        features=feats,
    )
    t0 = 1_780_000_000.0
    preds, truths, pairs, losses = [], [], [], []
    for i in range(n):
        t = t0 + i
        p = Prediction("bench", str(i), float(pred[i]), t, ts=t, features={k: float(v) for k, v in zip(FEATURES, X[i])})
        tr = Truth("bench", str(i), float(y[i]), t + 0.5, ts=t + 0.5)
        preds.append(p)
        truths.append(tr)
        pairs.append(Pair(p, tr, t + 0.5))
        losses.append((float(y[i]) - float(pred[i])) ** 2)
    return card, preds, truths, pairs, losses


def timed(setup: Callable[[], Any], run: Callable[[Any], None]) -> float:
    """CPU seconds of one ``run(setup())``, the setup (building checks or learners) not counted.

    CPU time of this process rather than wall time, so that waiting for a core on a shared
    machine is not counted.
    """
    obj = setup()
    t = time.process_time()
    run(obj)
    return time.process_time() - t


def drive(checks: dict[str, Any], preds, truths, pairs, losses) -> None:
    """One prediction, one truth and one pair per row, routed as the core routes them: a
    check's verb only where it ``takes`` the input, then its ``evaluate`` where the input is
    among its ``reacts_to`` and the verb did not say False (nothing new)."""

    def route(kind: str, verb: str) -> list[tuple[Any, Any]]:
        return [
            (
                getattr(c, verb) if kind in c.takes else None,
                c.evaluate if kind in c.reacts_to else None,
            )
            for c in checks.values()
        ]

    on_p, on_t, on_pr = route("prediction", "on_prediction"), route("truth", "on_truth"), route("pair", "on_pair")
    for p, tr, pr, loss in zip(preds, truths, pairs, losses):
        for take, ask in on_p:
            if (take is None or take(p)) and ask is not None:
                ask(p.t)
        for take, ask in on_t:
            if (take is None or take(tr)) and ask is not None:
                ask(tr.t)
        for take, ask in on_pr:
            if (take is None or take(pr, loss)) and ask is not None:
                ask(pr.t)


def make(name: str, card: ModelCard, **settings: Any) -> Any:
    ctx = CheckContext("bench", card, "squared", 1.0, "holdout", window_size=500, min_pairs=100)
    return check_class(name)(settings_class(name)(**settings), ctx)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=5000, help="rows per timed run")
    ap.add_argument("--rounds", type=int, default=15, help="rounds; every figure is the fastest round")
    args = ap.parse_args()
    n = args.pairs
    card, preds, truths, pairs, losses = build(n)
    ctx = CheckContext("bench", card, "squared", 1.0, "holdout")
    xs = [p.features for p in preds]
    ys = [tr.value for tr in truths]
    ratios = [min(x, 10.0) for x in losses]
    payloads = [json.dumps({"id": p.id, "value": p.value, "ts": p.ts, "features": p.features}) for p in preds]
    default_names = ["gap", "range", "shift", "feed_stop"]

    def run_checks(checks: dict[str, Any]) -> None:
        drive(checks, preds, truths, pairs, losses)

    def run_learner(m: Any) -> None:
        for x, y in zip(xs, ys):
            m.predict_one(x)
            m.learn_one(x, y)

    def run_detector(d: Any) -> None:
        for r in ratios:
            d.update(r)

    def run_json(_: Any) -> None:
        for s in payloads:
            json.loads(s)

    from river import drift as rdrift

    jobs: dict[str, tuple[Callable[[], Any], Callable[[Any], None]]] = {
        "noop": (lambda: {"noop": Check(CheckSettings(), ctx)}, run_checks),
        "json": (lambda: None, run_json),
        "default": (lambda: {k: make(k, card) for k in default_names}, run_checks),
        "input": (lambda: {k: make(k, card) for k in ("range", "shift", "feed_stop")}, run_checks),
        "adwin": (lambda: rdrift.ADWIN(), run_detector),
    }
    for name in default_names + ["drift"]:
        jobs[name] = (lambda name=name: {name: make(name, card)}, run_checks)
    for learner in ("mean", "linear", "tree"):
        jobs[f"river-{learner}"] = (lambda learner=learner: make_learner(learner, 0), run_learner)
        jobs[f"baseline-{learner}"] = (
            lambda learner=learner: {"baseline": make("baseline", card, learners=[learner], recent_pairs=500)},
            run_checks,
        )

    best = dict.fromkeys(jobs, float("inf"))
    for _ in range(args.rounds):  # interleaved rounds: a busy moment on the machine hits every job alike
        for key, (setup, run) in jobs.items():
            best[key] = min(best[key], timed(setup, run))
    us = {k: v / n * 1e6 for k, v in best.items()}  # microseconds per row (one pair, two records)

    print(
        f"{n} rows a run (one prediction, one truth and one pair each; {len(FEATURES)} features); "
        f"fastest of {args.rounds} interleaved rounds"
    )
    print()
    print("check            us per record   us per pair")
    print(f"{'(no-op check)':<16} {us['noop'] / 2:>13.2f}   {us['noop']:>11.2f}   three evaluate calls a row alone")
    for name in default_names + ["drift"]:
        print(f"{name:<16} {us[name] / 2:>13.2f}   {us[name]:>11.2f}")
    d = us["default"] / 2
    print(
        f"{'default four':<16} {d:>13.2f}   {us['default']:>11.2f}   target <= 3 us per record: "
        f"{'met' if d <= 3 else 'NOT met'}"
    )
    print(f"{'without gap':<16} {us['input'] / 2:>13.2f}   {us['input']:>11.2f}   range, shift and feed_stop together")
    print(
        f"{'(json.loads)':<16} {us['json']:>13.2f}                 of one prediction payload; "
        f"default checks per record / json.loads = {d / us['json']:.2f}"
    )
    over = us["drift"] - us["adwin"]
    allowed = max(0.25 * us["adwin"], 3.0)
    print(
        f"drift: {us['drift']:.2f} us per pair, river ADWIN.update alone {us['adwin']:.2f} us "
        f"(ratio {us['drift'] / us['adwin']:.1f}); overhead {over:.2f} us, target <= {allowed:.2f} us: "
        f"{'met' if over <= allowed else 'NOT met'}"
    )
    print()
    print("learner   river loop us/pair   baseline check us/pair   overhead us   overhead %   target")
    for learner in ("mean", "linear", "tree"):
        r, o = us[f"river-{learner}"], us[f"baseline-{learner}"]
        over = o - r
        allowed = max(0.25 * r, 3.0)
        print(
            f"{learner:<9} {r:>18.2f}   {o:>22.2f}   {over:>11.2f}   {over / r:>10.1%}   "
            f"<= {allowed:.2f} us: {'met' if over <= allowed else 'NOT met'}"
        )


if __name__ == "__main__":
    main()

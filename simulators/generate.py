"""Run a scenario: train the deployed model, then produce the site's traffic with incidents.

Everything random comes from seeds through numpy's SeedSequence, one child stream per purpose
(training history, live sensors, process noise, truth timing), so the same seed gives the same
messages, byte for byte, on the same platform. The deployed model is trained from the
scenario's own ``site.seed``; the run's seed only changes the field traffic, so two seeds are
two days of the same deployment (one to tune on, one to check the choice on).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.events import rfc3339

from .card import build_card
from .fit import PolynomialModel, fit_polynomial
from .process import process_truth, sensor_series
from .scenario import Drift, FeedStop, Overfit, Regime, Scenario, Step

# child stream numbers of the seed; fixed so that adding a stream never shifts the others
_TRAINING, _SENSORS, _PROCESS, _TIMING, _LATENCY = range(5)


@dataclass(frozen=True)
class Message:
    """One message as the monitor receives it: receive time, topic, payload bytes."""

    t: float
    topic: str
    payload: bytes


@dataclass
class Run:
    """Everything one simulated run produced."""

    scenario: Scenario
    seed: int
    start_t: float
    end_t: float
    model: PolynomialModel
    card: ModelCard
    messages: list[Message]
    incidents: list[dict[str, Any]]
    counts: dict[str, int] = field(default_factory=dict)


def _rng(seed: int, purpose: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([seed, purpose]))


def _nest(path: str, value: Any) -> dict[str, Any]:
    """``_nest("a.b", 1) == {"a": {"b": 1}}``."""
    out: Any = value
    for part in reversed(path.split(".")):
        out = {part: out}
    return out


def _merge(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    for k, v in b.items():
        if k in a and isinstance(a[k], dict) and isinstance(v, dict):
            _merge(a[k], v)
        else:
            a[k] = v
    return a


def _real_sensors(sc: Scenario, t: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
    step = sc.timing.prediction_every_s
    return {s.name: sensor_series(s, t, step, sc.site.utc_offset_h, rng) for s in sc.sensors}


def train(sc: Scenario, seed: int) -> tuple[PolynomialModel, ModelCard]:
    """Generate the training history, fit the deployed model and build its card."""
    rng = _rng(seed, _TRAINING)
    step = sc.timing.prediction_every_s
    start = sc.site.start_t - sc.model.training_days * 86400.0
    n = int(sc.model.training_days * 86400.0 / step)
    need = sc.model.training_rows + sc.model.holdout_rows
    if need > n:
        raise ValueError(
            f"model.training_rows + holdout_rows = {need} exceeds the {n} rows of "
            f"{sc.model.training_days} training days; lengthen model.training_days"
        )
    t = start + step * np.arange(n)
    real = _real_sensors(sc, t, rng)
    y = process_truth(sc.process, real, step, rng)
    x = np.column_stack([np.round(real[f], 3) for f in sc.model.features])
    rows = rng.permutation(n)[:need]
    train_rows, hold_rows = np.sort(rows[: sc.model.training_rows]), np.sort(rows[sc.model.training_rows :])
    model = fit_polynomial(sc.model.features, x[train_rows], y[train_rows], sc.model.degree)
    notes = (
        f"simulated training: {sc.model.training_rows} rows drawn from {sc.model.training_days:g} days "
        f"at {sc.site.name}; polynomial degree {sc.model.degree}, {model.parameters} parameters"
    )
    card = build_card(
        model,
        sc.model.id,
        sc.model.version,
        sc.model.loss,
        x[train_rows],
        y[train_rows],
        x[hold_rows] if len(hold_rows) else None,
        y[hold_rows] if len(hold_rows) else None,
        notes=notes,
    )
    return model, card


def _span(sc: Scenario, inc, end_t: float) -> tuple[float, float]:
    start = sc.site.start_t + inc.start_h * 3600.0
    end = end_t if inc.end_h is None else min(end_t, sc.site.start_t + inc.end_h * 3600.0)
    return start, end


def _describe(inc) -> str:
    if inc.detail:
        return inc.detail
    if isinstance(inc, Drift):
        return f"{inc.sensor} reading drifts by {inc.rate_per_h:+g} per hour"
    if isinstance(inc, Step):
        return f"{inc.sensor} reading offset by {inc.offset:+g}"
    if isinstance(inc, Regime):
        return f"{inc.sensor} really moves by {inc.offset:+g}, outside the training range"
    if isinstance(inc, FeedStop):
        return "truth feed stopped"
    return "deployed model too complex for its training rows"


def simulate(sc: Scenario, seed: int | None = None, duration_h: float | None = None) -> Run:
    """Simulate a scenario and return its messages (sorted by receive time) and incidents."""
    seed = sc.site.seed if seed is None else int(seed)
    hours = sc.site.duration_h if duration_h is None else float(duration_h)
    if hours <= 0:
        raise ValueError(f"duration must be positive, got {hours} hours")
    model, card = train(sc, sc.site.seed)
    step = sc.timing.prediction_every_s
    start_t = sc.site.start_t
    end_t = start_t + hours * 3600.0
    n = int(hours * 3600.0 / step)
    ts = start_t + step * np.arange(n)

    real = _real_sensors(sc, ts, _rng(seed, _SENSORS))
    measured_offset = {name: np.zeros(n) for name in real}
    incidents: list[dict[str, Any]] = []
    feed_stops: list[tuple[float, float]] = []
    for inc in sc.incidents:
        a, b = _span(sc, inc, end_t)
        if a >= end_t:
            continue
        inside = (ts >= a) & (ts < b)
        if isinstance(inc, Drift):
            measured_offset[inc.sensor] += np.where(inside, inc.rate_per_h * (ts - a) / 3600.0, 0.0)
        elif isinstance(inc, Step):
            measured_offset[inc.sensor] += np.where(inside, inc.offset, 0.0)
        elif isinstance(inc, Regime):
            real[inc.sensor] = real[inc.sensor] + np.where(inside, inc.offset, 0.0)
        elif isinstance(inc, FeedStop):
            feed_stops.append((a, b))
        elif not isinstance(inc, Overfit):  # pragma: no cover - the union is closed
            raise TypeError(inc)
        incidents.append(
            {
                "kind": inc.kind,
                "model": sc.model.id,
                "start": a,
                "end": b,
                "start_ts": rfc3339(a),
                "end_ts": rfc3339(b),
                "sensor": getattr(inc, "sensor", None),
                "detail": _describe(inc),
            }
        )

    truth = process_truth(sc.process, real, step, _rng(seed, _PROCESS))
    measured = {k: np.round(real[k] + measured_offset[k], 3) for k in real}
    x = np.column_stack([measured[f] for f in sc.model.features])
    pred = model.predict(x)

    tim = sc.timing
    trng = _rng(seed, _TIMING)
    has_truth = trng.random(n) < tim.truth_share
    delay = trng.uniform(tim.truth_delay_min_s, tim.truth_delay_max_s, n)
    lrng = _rng(seed, _LATENCY)
    lat_pred = lrng.uniform(0.0, tim.latency_max_s, n)
    lat_truth = lrng.uniform(0.0, tim.latency_max_s, n)

    pl = sc.fields
    pred_topic, truth_topic = sc.topics.prediction, sc.topics.truth
    out: list[tuple[float, int, str, bytes]] = []
    counts = {"predictions": 0, "truths": 0, "truths_withheld": 0, "truths_after_end": 0}
    version = sc.model.version
    for i in range(n):
        pid = f"{sc.model.id_prefix}-{i:07d}"
        src = round(float(ts[i]), 3)
        feats = {f: float(measured[f][i]) for f in sc.model.features}
        body = {"id": pid, "ts": src}
        _merge(body, _nest(pl.prediction.value, round(float(pred[i]), 4)))
        _merge(body, _nest(pl.prediction.features, feats))
        body["model_version"] = version
        t_recv = round(float(ts[i] + lat_pred[i]), 3)
        out.append((t_recv, 2 * i, pred_topic, json.dumps(body, separators=(",", ":")).encode()))
        counts["predictions"] += 1
        if not has_truth[i]:
            continue
        published = float(ts[i] + delay[i])
        if any(a <= published < b for a, b in feed_stops):
            counts["truths_withheld"] += 1
            continue
        t_recv = round(published + float(lat_truth[i]), 3)
        if t_recv >= end_t:
            counts["truths_after_end"] += 1
            continue
        tbody: dict[str, Any] = {"id": pid, "ts": src}
        _merge(tbody, _nest(pl.truth.value, round(float(truth[i]), 4)))
        out.append((t_recv, 2 * i + 1, truth_topic, json.dumps(tbody, separators=(",", ":")).encode()))
        counts["truths"] += 1
    out.sort(key=lambda m: (m[0], m[1]))
    messages = [Message(t, topic, payload) for t, _, topic, payload in out]
    return Run(sc, seed, start_t, end_t, model, card, messages, incidents, counts)

"""Small builders shared by the tests: cards, configs and payloads."""

from __future__ import annotations

import json
from typing import Any

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.settings import Config, parse_config


def card(
    model_id: str = "m",
    holdout: float | None = 1.0,
    train: float = 1.0,
    n: int = 1000,
    d: int = 3,
    least_squares: bool = True,
    features: dict | None = None,
    loss: str = "squared",
) -> ModelCard:
    """A card with the given expected loss (held-out by default)."""
    return ModelCard(
        model_id=model_id,
        loss=loss,
        training={"loss": train, "count": n},
        fitted_parameters=d,
        least_squares=least_squares,
        holdout=None if holdout is None else {"loss": holdout, "count": 200},
        features=features or {},
    )


def config(
    models: list[str] | None = None,
    checks: dict | None = None,
    window: dict | None = None,
    agent: dict | None = None,
    **model_extra: Any,
) -> Config:
    """A config with one entry per model id, topics ``<id>/pred`` and ``<id>/truth``."""
    entries = []
    for mid in models or ["m"]:
        e = {
            "id": mid,
            "card": f"{mid}.json",
            "prediction_topic": f"{mid}/pred",
            "truth_topic": f"{mid}/truth",
            "checks": checks or {},
            "window": window or {"size_pairs": 200, "min_pairs": 100},
        }
        e.update(model_extra)
        entries.append(e)
    data: dict[str, Any] = {"models": entries}
    if agent:
        data["agent"] = agent
    return parse_config(data)


def pred(i: int | str, value: float, **extra: Any) -> bytes:
    return json.dumps({"id": i, "value": value, **extra}).encode()


def truth(i: int | str, value: float, **extra: Any) -> bytes:
    return json.dumps({"id": i, "value": value, **extra}).encode()
